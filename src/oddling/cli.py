"""The `oddling` command: parse options, call the API, print. No business logic here."""
from __future__ import annotations

import functools
import json
import sys
import warnings
from pathlib import Path

import click

from oddling import __version__
from oddling import api
from oddling.backbones import DEFAULT_BACKBONE, RUNTIMES, load_manifest
from oddling.errors import OddlingError

EXIT_ATTENTION = 1   # the job ran, and something a flag asked about needs attention
EXIT_BAD_INPUT = 2   # click's convention for usage errors; we use it for bad input too


def _show_warning(message, category, filename, lineno, file=None, line=None):
    click.echo(f"warning: {message}", err=True)


def user_errors(func):
    """Turn user mistakes into a one-line message and exit code 2 instead of a traceback."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        warnings.showwarning = _show_warning
        try:
            return func(*args, **kwargs)
        except OddlingError as exc:
            click.echo(f"Error: {exc}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except KeyboardInterrupt:
            click.echo("Interrupted.", err=True)
            sys.exit(130)

    return wrapper


def run_options(func):
    """Options every embedding command shares."""
    options = [
        click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
                     help="Folder for weights and caches [default: $ODDLING_CACHE_DIR or the user cache folder]."),
        click.option("--runtime", type=click.Choice(RUNTIMES), default="auto", show_default=True,
                     help="Inference runtime; auto = ONNX Runtime when installed, else PyTorch."),
        click.option("--batch-size", type=click.IntRange(min=1), default=32, show_default=True,
                     help="Images per network call."),
        click.option("--workers", type=click.IntRange(min=1), default=None,
                     help="Decoding threads [default: number of cores, at most 4]."),
        click.option("--no-cache", is_flag=True, help="Neither reuse nor save embeddings in the cache folder."),
        click.option("--quiet", "-q", is_flag=True, help="No progress bar."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


# Options several commands share, declared once.
bank_option = click.option(
    "--bank", "bank_path", required=True, type=click.Path(exists=True, file_okay=False, path_type=Path),
    help="Bank folder made by `oddling fit`.")
target_fpr_override = click.option(
    "--target-fpr", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=None,
    help="Override the bank's false-alarm rate for this run.")


def _refuse_existing(*paths: Path | None, force: bool) -> None:
    """Check outputs before any work starts, so a refusal costs nothing."""
    for path in paths:
        if path is not None and path.exists() and not force:
            raise OddlingError(f"{path} already exists; pass --force to overwrite it")


def _options(cache_dir, runtime, batch_size, workers, no_cache, quiet) -> api.RunOptions:
    return api.RunOptions(cache_dir=cache_dir, runtime=runtime, batch_size=batch_size, workers=workers,
                          progress=not quiet, use_cache=not no_cache)


def _num(value, digits: int = 3) -> str:
    """A metric for people: fixed decimals, or n/a where it is undefined (e.g. a CI from 1 sample)."""
    return "n/a" if value is None else f"{value:.{digits}f}"


def _print_json(data: dict) -> None:
    click.echo(json.dumps(data, indent=2, sort_keys=True))


@click.group(context_settings={"help_option_names": ["-h", "--help"], "show_default": True})
@click.version_option(__version__, prog_name="oddling")
def main():
    """Find the odd ones out in image collections.

    Fit a bank from a folder of normal images, then score new folders against it.
    Higher scores are more anomalous.
    """


@main.command()
@click.argument("reference_dir", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--bank", "bank_path", required=True, type=click.Path(path_type=Path),
              help="Folder to write the bank into.")
@click.option("--backbone", default=DEFAULT_BACKBONE, show_default=True,
              help="Backbone id from the manifest (see `oddling backbones list`).")
@click.option("--k", type=click.IntRange(min=1), default=5, show_default=True,
              help="Neighbours averaged into each score.")
@click.option("--target-fpr", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=0.01,
              show_default=True, help="False-alarm rate on normal images that sets the flag cutoff.")
@click.option("--mode", type=click.Choice(api.MODES), default="global", show_default=True,
              help="global: whole-image similarity; local: patch-level, finds small defects and maps them.")
@click.option("--coreset", type=click.FloatRange(0, 1, min_open=True), default=0.1, show_default=True,
              help="Local mode: share of reference patches kept in the bank (greedy k-center).")
@click.option("--force", is_flag=True, help="Replace an existing bank.")
@run_options
@user_errors
def fit(reference_dir, bank_path, backbone, k, target_fpr, mode, coreset, force, **run):
    """Build a reference bank from REFERENCE_DIR, a folder of known-normal images."""
    bank = api.fit(reference_dir, bank_path, backbone=backbone, k=k, target_fpr=target_fpr,
                   mode=mode, coreset=coreset, force=force, options=_options(**run))
    cutoff = bank.calibration["cutoff"]
    click.echo(
        f"Bank written to {bank_path}: {bank.size} references, backbone {bank.backbone['id']}, k={bank.k}, "
        f"cutoff {'none (too few images)' if cutoff is None else _num(cutoff, 4)} "
        f"at target false-alarm rate {target_fpr}.", err=True)
    if bank.mode == "local":
        info = bank.local
        click.echo(f"Local mode: {info['coreset_size']} of {info['n_patches']} patches kept (coreset "
                   f"{info['coreset_fraction']}, {info['size_mb']} MB); {bank.calibration['n']} references "
                   "held out to calibrate.", err=True)
    if bank.skipped:
        click.echo(f"{len(bank.skipped)} files skipped (listed in {bank_path}/bank.json):", err=True)
        for item in bank.skipped[:10]:
            click.echo(f"  {item['path']}: {item['status']}", err=True)


@main.command()
@click.argument("incoming_dir", type=click.Path(exists=True, file_okay=False, path_type=Path))
@bank_option
@click.option("--out", "out_csv", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="CSV to write, one row per file, highest score first.")
@target_fpr_override
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary to stdout.")
@click.option("--fail-on-flagged", is_flag=True, help="Exit 1 when any image is flagged.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Also write the review page (self-contained HTML) here.")
@click.option("--maps", "maps_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Local-mode banks: write a heatmap overlay PNG per image into this folder.")
@click.option("--force", is_flag=True, help="Overwrite existing output files.")
@run_options
@user_errors
def score(incoming_dir, bank_path, out_csv, target_fpr, as_json, fail_on_flagged, report_path, maps_dir, force,
          **run):
    """Score every image in INCOMING_DIR against a bank."""
    _refuse_existing(out_csv, report_path, force=force)
    result = api.score(incoming_dir, bank_path, target_fpr=target_fpr, options=_options(**run))
    result.write_csv(out_csv, force=True)
    summary = result.summary() | {"out": str(out_csv)}
    if maps_dir is not None:
        result.write_maps(maps_dir)
        summary["maps"] = str(maps_dir)
    if report_path is not None:
        from oddling.reporting.page import write_report

        summary["report"] = str(write_report(report_path, result, force=True))
    if as_json:
        _print_json(summary)
    else:
        click.echo(
            f"Scored {summary['n_scored']} of {summary['n_files']} files "
            f"({summary['n_skipped']} unreadable or skipped); {summary['n_flagged']} flagged at "
            f"target false-alarm rate {summary['target_fpr']}. Results: {out_csv}", err=True)
    if fail_on_flagged and summary["n_flagged"]:
        sys.exit(EXIT_ATTENTION)


@main.command()
@click.argument("test_dir", type=click.Path(exists=True, file_okay=False, path_type=Path))
@bank_option
@click.option("--out-dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Folder for metrics.json, scores.csv, roc.png, pr.png.")
@click.option("--labels", "labels_csv", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="CSV with path,label (normal/anomaly or 0/1) instead of class subfolders.")
@click.option("--normal-label", "normal_labels", multiple=True, default=("normal",), show_default=True,
              help="Subfolder name that holds normal images (repeatable); every other subfolder is an anomaly kind.")
@click.option("--beta", type=click.FloatRange(min=0, min_open=True), default=1.0, show_default=True,
              help="F-beta weight for the best-cutoff search; beta > 1 weighs recall more.")
@target_fpr_override
@click.option("--json", "as_json", is_flag=True, help="Print metrics.json to stdout.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Also write the review page (self-contained HTML) here.")
@click.option("--force", is_flag=True, help="Overwrite earlier results in --out-dir.")
@run_options
@user_errors
def evaluate(test_dir, bank_path, out_dir, labels_csv, normal_labels, beta, target_fpr, as_json, report_path,
             force, **run):
    """Measure the detector on TEST_DIR, a folder of labelled images."""
    _refuse_existing(report_path, force=force)
    result = api.evaluate(test_dir, bank_path, labels_csv=labels_csv, normal_labels=tuple(normal_labels),
                          beta=beta, target_fpr=target_fpr, options=_options(**run))
    paths = result.write(out_dir, force=force)
    if report_path is not None:
        from oddling.reporting.page import write_report

        write_report(report_path, result, bank=result.bank, scored_root=test_dir, force=True)
        click.echo(f"Review page: {report_path}", err=True)
    m = result.metrics
    if as_json:
        _print_json(m)
    else:
        c = m["at_cutoff"]
        low, high = m["auroc_ci95"]
        click.echo(
            f"{m['n_normal']} normal, {m['n_anomalous']} anomalous images: AUROC {_num(m['auroc'])} "
            f"(95% CI {_num(low)}-{_num(high)}), average precision {_num(m['average_precision'])}.\n"
            f"At the bank's cutoff: precision {_num(c['precision'])}, recall {_num(c['recall'])}, "
            f"false-alarm rate {_num(c['fpr'])}.\nResults in {paths['metrics'].parent}", err=True)
        if m["unreadable"]:
            click.echo(f"{len(m['unreadable'])} unreadable files listed in metrics.json (not counted).", err=True)


@main.command()
@click.argument("folder", type=click.Path(exists=True, file_okay=False, path_type=Path))
@bank_option
@click.option("--out", "out_html", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="HTML file to write; plots go to a sibling folder <name>_plots/.")
@click.option("--labelled", is_flag=True,
              help="FOLDER is a labelled test folder (class subfolders, or --labels): show labels and metrics.")
@click.option("--labels", "labels_csv", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="CSV with path,label for a labelled folder (implies --labelled).")
@click.option("--normal-label", "normal_labels", multiple=True, default=("normal",), show_default=True,
              help="Subfolder name that holds normal images (repeatable).")
@click.option("--top", "top_n", type=click.IntRange(min=1), default=200, show_default=True,
              help="Cards shown in the gallery, highest scores first.")
@target_fpr_override
@click.option("--force", is_flag=True, help="Overwrite an existing page.")
@run_options
@user_errors
def report(folder, bank_path, out_html, labelled, labels_csv, normal_labels, top_n, target_fpr, force, **run):
    """Write the review page for FOLDER scored against a bank (cached embeddings make this quick)."""
    from oddling.reporting.page import write_report

    _refuse_existing(out_html, force=force)
    options = _options(**run)
    if labelled or labels_csv:
        result = api.evaluate(folder, bank_path, labels_csv=labels_csv, normal_labels=tuple(normal_labels),
                              target_fpr=target_fpr, options=options)
        path = write_report(out_html, result, bank=result.bank, scored_root=folder, top_n=top_n, force=True)
    else:
        result = api.score(folder, bank_path, target_fpr=target_fpr, options=options)
        path = write_report(out_html, result, top_n=top_n, force=True)
    click.echo(f"Review page: {path}", err=True)


@main.command()
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


@main.command()
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


@main.command()
@click.argument("incoming_dir", required=False, type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--bank", "bank_path", type=click.Path(exists=True, file_okay=False, path_type=Path),
              help="Bank to compare the batch with.")
@click.option("--history", "history_bank", type=click.Path(exists=True, file_okay=False, path_type=Path),
              help="Instead of testing a batch: read this bank's history of checks (with --plot).")
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False, path_type=Path),
              help="With --history: draw flagged share and MMD over time into this PNG.")
@click.option("--permutations", type=click.IntRange(min=19), default=500, show_default=True,
              help="Permutations for the MMD p-value.")
@click.option("--seed", type=int, default=0, show_default=True, help="Seed for subsampling and permutations.")
@click.option("--json", "as_json", is_flag=True, help="Print the statistics as JSON.")
@click.option("--fail-on-shift", is_flag=True, help="Exit 1 when the batch has shifted.")
@run_options
@user_errors
def drift(incoming_dir, bank_path, history_bank, plot_path, permutations, seed, as_json, fail_on_shift, **run):
    """Test whether the batch INCOMING_DIR as a whole has shifted away from the bank."""
    if history_bank is not None:
        entries = api.drift_history(history_bank)
        if plot_path is not None:
            from oddling.reporting.plots import plot_drift_history

            plot_drift_history(entries, entries[-1]["expected_share"], plot_path)
            click.echo(f"{len(entries)} checks drawn in {plot_path}", err=True)
        if as_json:
            _print_json({"history": entries})
        elif plot_path is None:
            for e in entries:
                click.echo(f"{e['time']}  {'SHIFT   ' if e['shift'] else 'no shift'}  flagged {e['flagged_share']:.3f} "
                           f"(expected {e['expected_share']:g})  MMD {e['mmd']:.4f} p {e['mmd_p_value']:.4f}  {e['batch']}")
        return
    if incoming_dir is None or bank_path is None:
        raise click.UsageError("give INCOMING_DIR and --bank, or --history BANK")
    result = api.drift(incoming_dir, bank_path, n_permutations=permutations, seed=seed, options=_options(**run))
    if as_json:
        _print_json(result)
    else:
        verdict = "SHIFT: this batch differs from the references" if result["shift"] else "no shift detected"
        click.echo(
            f"{verdict}\n"
            f"  embedding distribution: MMD {result['mmd']:.4f}, permutation p-value {result['mmd_p_value']:.4f}\n"
            f"  flagged share: {result['flagged_share']:.3f} of {result['n_batch']} (expected {result['expected_share']:g}),"
            f" binomial p-value {result['binomial_p_value']:.4g}")
    if fail_on_shift and result["shift"]:
        sys.exit(EXIT_ATTENTION)


@main.command()
@bank_option
@click.option("--json", "as_json", is_flag=True, help="Print the findings as JSON (input for `bank remove`).")
@user_errors
def audit(bank_path, as_json):
    """Check the reference set itself: outliers, duplicates, near duplicates, unhealthy frames."""
    result = api.audit(bank_path)
    if as_json:
        _print_json(result)
        return
    findings = result["findings"]
    if not findings:
        click.echo(f"No findings among {result['n_references']} references.")
    for f in findings:
        click.echo(f"{f['kind']:15s} {f['path']}: {f['detail']}")


@main.group("bank")
def bank_group():
    """Inspect a bank and change its references without rebuilding it."""


@bank_group.command("info")
@click.argument("bank_path", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@user_errors
def bank_info(bank_path, as_json):
    """What BANK holds and how it was made."""
    info = api.bank_info(bank_path)
    if as_json:
        _print_json(info)
        return
    cal = info["calibration"]
    click.echo(
        f"bank {info['path']} (format {info['format_version']}, made {info['created']} by oddling {info['tool_version']})\n"
        f"  backbone   {info['backbone']['id']} (weights SHA-256 {info['backbone']['weights_sha256'][:16]}...)\n"
        f"  references {info['n_references']} from {info['reference_root']} ({info['n_skipped']} files skipped)\n"
        f"  mode {info['mode']}, k={info['k']}; calibration {cal['method']} on {cal['n']} scores; cutoff "
        f"{_num(cal['cutoff'], 4)} at target false-alarm rate {cal['target_fpr']}")


@bank_group.command("add")
@click.argument("bank_path", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.argument("source", type=click.Path(exists=True, path_type=Path))
@click.option("--root", type=click.Path(exists=True, file_okay=False, path_type=Path), default=None,
              help="Folder the decisions CSV's relative paths start from [default: the CSV's folder].")
@run_options
@user_errors
def bank_add(bank_path, source, root, **run):
    """Add SOURCE to BANK: a folder of normal images, or a report's decisions CSV (rows marked normal)."""
    result = api.bank_add(bank_path, source, root=root, options=_options(**run))
    click.echo(f"Added {result['added']} references ({result['already_in_bank']} already in the bank, "
               f"{len(result['skipped'])} unreadable); the bank now holds {result['n_references']}.", err=True)


@bank_group.command("remove")
@click.argument("bank_path", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.argument("items", nargs=-1, required=True)
@click.option("--kind", "kinds", multiple=True,
              type=click.Choice(["outlier", "duplicate", "near_duplicate", "health"]),
              help="With an audit JSON: remove only findings of this kind (repeatable) [default: all].")
@user_errors
def bank_remove(bank_path, items, kinds):
    """Remove references from BANK: their paths as `bank info`/`audit` show them, or an audit JSON file."""
    paths = []
    for item in items:
        if item.endswith(".json") and Path(item).is_file():
            try:
                findings = json.loads(Path(item).read_text(encoding="utf-8"))["findings"]
            except (ValueError, KeyError) as exc:
                raise OddlingError(f"{item} is not an audit JSON (from `oddling audit --json`)") from exc
            paths += [f["path"] for f in findings if not kinds or f["kind"] in kinds]
        else:
            paths.append(item)
    result = api.bank_remove(bank_path, paths)
    click.echo(f"Removed {result['removed']} references; the bank now holds {result['n_references']}.", err=True)
    for missing in result["not_found"][:10]:
        click.echo(f"  not in the bank: {missing}", err=True)


@main.group()
def backbones():
    """List backbones and install their weight files."""


@backbones.command("list")
@click.option("--json", "as_json", is_flag=True, help="Print the list as JSON.")
def backbones_list(as_json):
    """Every backbone in the manifest."""
    specs = load_manifest()
    if as_json:
        _print_json({sid: {"family": s.family, "embedding_dim": s.embedding_dim, "source": s.weights["source"],
                           "licence": s.licence,
                           "stages": [{"name": name} | info for name, info in s.stages.items()]}
                     for sid, s in specs.items()})
        return
    for sid, s in specs.items():
        default = " (default)" if sid == DEFAULT_BACKBONE else ""
        stages = ", ".join(f"{name} ({info['channels']} ch, stride {info['stride']})"
                           for name, info in s.stages.items()) or "none"
        click.echo(f"{sid}{default}\n  {s.description}\n  dim {s.embedding_dim}, weights: {s.weights['source']}, "
                   f"licence: {s.licence}\n  stages: {stages}")


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


if __name__ == "__main__":  # pragma: no cover
    main()
