"""The demo on an invented scenario, and the throughput measurement."""
from __future__ import annotations

from pathlib import Path

import click

from oddling.backbones import DEFAULT_BACKBONE
from oddling.cli.options import _options, run_options
from oddling.cli.output import _num, _print_json, user_errors


@click.command()
@click.argument("directory", type=click.Path(file_okay=False, path_type=Path), default=Path("oddling-demo"))
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of the generated scenario.")
@click.option("--force", is_flag=True, help="Replace an earlier demo in DIRECTORY.")
@click.option("--json", "as_json", is_flag=True, help="Print the headline numbers as JSON.")
@run_options
@user_errors
def demo(directory, seed, force, as_json, **run):
    """Generate an invented tile-inspection scenario in DIRECTORY and run fit, score and evaluate on it."""
    from oddling.demo.run import run_demo

    say = (lambda msg: click.echo(msg, err=True))
    out = run_demo(directory, seed=seed, force=force, options=_options(**run), log=say)
    if as_json:
        _print_json({k: v for k, v in out.items() if k != "scene"})
        return
    low, high = out["auroc_ci95"]
    c = out["at_cutoff"]
    inc = out["incoming"]
    click.echo(
        f"\nDemo finished in {out['root']}\n"
        f"  bank:              {out['bank']} ({out['n_references']} reference tiles)\n"
        f"  incoming batch:    {inc['n_flagged']} of {inc['n_scored']} frames flagged -> {out['incoming_scores']}\n"
        f"                     (the truth, for checking: {out['incoming_truth']})\n"
        f"  review pages:      {out['incoming_report']} and {out['evaluation']['report']}\n"
        f"  labelled test set: AUROC {_num(out['auroc'])} (95% CI {_num(low)}-{_num(high)}), "
        f"average precision {_num(out['average_precision'])}\n"
        f"                     at the cutoff: precision {_num(c['precision'])}, recall {_num(c['recall'])}, "
        f"false-alarm rate {_num(c['fpr'])}\n"
        f"  plots and metrics: {Path(out['evaluation']['metrics']).parent}")


@click.command()
@click.option("--backbone", default=DEFAULT_BACKBONE, show_default=True, help="Backbone id to measure.")
@click.option("--images", "n_images", type=click.IntRange(min=8), default=96, show_default=True,
              help="Generated test images to measure on.")
@click.option("--estimate", "estimate_for", type=click.IntRange(min=1), default=100000, show_default=True,
              help="Print the expected time for this many images.")
@click.option("--json", "as_json", is_flag=True, help="Print the measurements as JSON.")
@run_options
@user_errors
def bench(backbone, n_images, estimate_for, as_json, cache_dir, runtime, batch_size, workers, no_cache, quiet):
    """Measure decode, embed and search speed on this machine."""
    from oddling.embedding.throughput import estimate_seconds, measure

    log = (lambda msg: None) if quiet else (lambda msg: click.echo(msg, err=True))
    result = measure(backbone, runtime, n_images=n_images, batch_size=batch_size, workers=workers,
                     cache_dir=cache_dir, log=log)
    seconds = estimate_seconds(result, estimate_for)
    if as_json:
        _print_json(result | {"estimate_images": estimate_for, "estimate_seconds": round(seconds, 1)})
        return
    click.echo(
        f"backbone {result['backbone']} on {result['runtime']}, {result['workers']} decode threads, "
        f"batch {result['batch_size']}:\n"
        f"  decode + preprocess  {result['decode_per_s']:8.1f} img/s\n"
        f"  network              {result['embed_per_s']:8.1f} img/s\n"
        f"  end to end           {result['end_to_end_per_s']:8.1f} img/s\n"
        f"  kNN search           {result['search_queries_per_s']:8.0f} queries/s on a {result['bank_size']}-image bank\n"
        f"about {seconds / 60:.1f} min for {estimate_for} images (1-MP JPEGs; larger files decode slower)")


