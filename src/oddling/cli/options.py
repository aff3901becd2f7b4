"""The options several commands declare, declared once: how to run the representation (turned into
RunOptions), the bank, Dask, and what a new bank's cutoff promises."""
from __future__ import annotations

import functools
from pathlib import Path

import click

from oddling.backbones import PRECISIONS, RUNTIMES
from oddling.embedding.options import RunOptions


def run_options(func):
    """Options every embedding command shares. `--precision` is folded into the runtime text
    ("openvino:bf16") that the command hands to RunOptions, so commands need no extra parameter."""

    @functools.wraps(func)
    def with_precision(*args, precision: str = "fp32", **kwargs):
        if precision != "fp32":
            kwargs["runtime"] = f"{kwargs.get('runtime', 'auto')}:{precision}"
        return func(*args, **kwargs)

    options = [
        click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
                     help="Folder for weights and caches [default: $ODDLING_CACHE_DIR or the user cache folder]."),
        click.option("--runtime", type=click.Choice(RUNTIMES), default="auto", show_default=True,
                     help="Inference runtime; auto = OpenVINO when installed, else ONNX Runtime, else PyTorch."),
        click.option("--precision", type=click.Choice(PRECISIONS), default="fp32", show_default=True,
                     help="Network precision; bf16 (OpenVINO, CPUs with bf16 units) is checked against fp32 "
                          "on the first batch of each run and refused if it changes the embeddings."),
        click.option("--batch-size", type=click.IntRange(min=1), default=32, show_default=True,
                     help="Images per network call."),
        click.option("--workers", type=click.IntRange(min=1), default=None,
                     help="Decoding threads [default: number of cores, at most 4]."),
        click.option("--no-cache", is_flag=True, help="Neither reuse nor save embeddings in the cache folder."),
        click.option("--quiet", "-q", is_flag=True, help="No progress bar."),
    ]
    for option in reversed(options):
        with_precision = option(with_precision)
    return with_precision


# Options several commands share, declared once.
# A bank path is not checked for existence here: load_bank puts back a bank whose replacement
# stopped half way (the folder renamed aside), and says in its own words when there is none.
BANK_PATH = click.Path(file_okay=False, path_type=Path)
bank_option = click.option(
    "--bank", "bank_path", required=True, type=BANK_PATH,
    help="Bank folder made by `oddling fit`.")
dask_option = click.option(
    "--dask", "dask", metavar="ADDRESS", envvar="DASK_SCHEDULER_ADDRESS", default=None,
    help="Embed on the workers of this Dask scheduler (e.g. tcp://10.0.0.5:8786) [default: $DASK_SCHEDULER_ADDRESS, "
         "else this machine]; needs oddling[cluster], see README.")
def calibration_options(func):
    """--target-fpr, --guarantee, --confidence and --allow-no-cutoff: what a new bank's cutoff promises
    (fit and tune)."""
    options = [
        click.option("--target-fpr", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=None,
                     help="False-alarm rate on normal images that sets the flag cutoff [default: 0.01, or the "
                          "first of 0.02, 0.05, 0.1 the calibration supports; the summary says which]."),
        click.option("--guarantee", type=click.Choice(["marginal", "confident"]), default="marginal",
                     show_default=True,
                     help="marginal: the rate holds on average over reference sets; confident: it holds for this "
                          "bank with probability --confidence (a lower cutoff rank, so more references needed)."),
        click.option("--confidence", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=None,
                     help="With --guarantee confident: the probability that this bank's rate is at most the "
                          "target [default: 0.9]."),
        click.option("--allow-no-cutoff", is_flag=True,
                     help="Write the bank even when the rate asked for cannot flag anything (then it flags "
                          "nothing, and --fail-on-flagged, watch and serve refuse it)."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


target_fpr_override = click.option(
    "--target-fpr", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=None,
    help="Override the bank's false-alarm rate for this run.")


def _options(cache_dir, runtime, batch_size, workers, no_cache, quiet, dask=None) -> RunOptions:
    return RunOptions(cache_dir=cache_dir, runtime=runtime, batch_size=batch_size, workers=workers,
                          progress=not quiet, use_cache=not no_cache, dask=dask or None)
