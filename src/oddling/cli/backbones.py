"""Listing backbones and representations, and installing weight files."""
from __future__ import annotations

import sys
from pathlib import Path

import click

from oddling import api
from oddling.cli.common import (EXIT_ATTENTION, _num, _options, _print_json, bank_option, run_options,
                                target_fpr_override, user_errors)
from oddling.backbones import DEFAULT_BACKBONE, load_manifest
from oddling.errors import OddlingError
from oddling.jobs.common import refuse_existing

@click.group()
def backbones():
    """List backbones and install their weight files."""


@backbones.command("list")
@click.option("--json", "as_json", is_flag=True, help="Print the list as JSON.")
def backbones_list(as_json):
    """Every backbone in the manifest."""
    specs = load_manifest()
    if as_json:
        _print_json({"backbones": {sid: {"family": s.family, "embedding_dim": s.embedding_dim,
                                         "source": s.weights["source"], "licence": s.licence,
                                         "stages": [{"name": name} | info for name, info in s.stages.items()],
                                         "representations": _representations(sid, s)}
                                   for sid, s in specs.items()},
                     "other_representations": ["pixels:SIZE", "pixels:SIZE:rgb"]})
        return
    for sid, s in specs.items():
        default = " (default)" if sid == DEFAULT_BACKBONE else ""
        stages = ", ".join(f"{name} ({info['channels']} ch, stride {info['stride']})"
                           for name, info in s.stages.items()) or "none"
        click.echo(f"{sid}{default}\n  {s.description}\n  dim {s.embedding_dim}, weights: {s.weights['source']}, "
                   f"licence: {s.licence}\n  stages: {stages}\n  representations: "
                   + ", ".join(_representations(sid, s)))
    click.echo("pixels\n  A small thumbnail, zero-mean and unit-norm per image; no network. For small, aligned "
               "images.\n  representations: pixels:SIZE (grey, e.g. pixels:32), pixels:SIZE:rgb")


def _representations(sid: str, spec) -> list[str]:
    """Examples of what --representation accepts for this backbone."""
    out = [sid]
    if spec.stages:
        out += [f"{sid}/stages:STAGE+STAGE...", f"{sid}/patches:stage2+stage3"]
    return out


@backbones.command("import")
@click.argument("backbone_id")
@click.argument("weights_file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Cache folder [default: $ODDLING_CACHE_DIR or the user cache folder].")
@click.option("--force", is_flag=True, help="Replace a file whose checksum differs from the pinned one.")
@user_errors
def backbones_import(backbone_id, weights_file, cache_dir, force):
    """Copy WEIGHTS_FILE into the cache for BACKBONE_ID and verify (or pin) its SHA-256."""
    from oddling.backbones.manifest import get_spec
    from oddling.backbones.weights import import_weights
    from oddling.paths import cache_dir as resolve_cache

    target, sha = import_weights(get_spec(backbone_id), weights_file, resolve_cache(cache_dir), force=force)
    click.echo(f"Imported {weights_file} -> {target} (SHA-256 {sha})", err=True)


