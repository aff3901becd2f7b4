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
        _print_json({sid: {"family": s.family, "embedding_dim": s.embedding_dim, "source": s.weights["source"],
                           "licence": s.licence} for sid, s in specs.items()})
        return
    for sid, s in specs.items():
        default = " (default)" if sid == DEFAULT_BACKBONE else ""
        click.echo(f"{sid}{default}\n  {s.description}\n  dim {s.embedding_dim}, weights: {s.weights['source']}, "
                   f"licence: {s.licence}")


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


