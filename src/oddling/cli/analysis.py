"""Commands of the main job: fit a bank, score a folder, evaluate on labelled images, write the review page."""
from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from oddling import api
from oddling.backbones import DEFAULT_BACKBONE
from oddling.cli.options import (_options, bank_option, calibration_options, dask_option, run_options,
                                 target_fpr_override)
from oddling.cli.output import EXIT_ATTENTION, _num, _print_json, user_errors
from oddling.detectors import DEFAULT_DETECTOR, DETECTORS
from oddling.errors import OddlingError
from oddling.files import check_output, refuse_existing
from oddling.index.selection import AUTO_APPROXIMATE, EXACT_BELOW
from oddling.numbers import plural


def parse_params(pairs: tuple[str, ...]) -> dict:
    """KEY=VALUE detector parameters; values read as JSON where they parse (numbers, true, null), else text."""
    params = {}
    for pair in pairs:
        key, sep, value = pair.partition("=")
        if not sep or not key.strip():
            raise OddlingError(f"--param takes KEY=VALUE, got: {pair!r}")
        try:
            params[key.strip()] = json.loads(value)
        except ValueError:
            params[key.strip()] = value
    return params


def detector_options(func):
    """--representation / --detector and their parameters, shared by fit and tune's reproduction hint."""
    options = [
        click.option("--representation", default=None,
                     help="Features to compare: BACKBONE (its embedding), BACKBONE/stages:S1+S2 (pooled stages), "
                          "BACKBONE/patches:S1+S2 (patch grid), pixels:SIZE[:rgb] or colour:GRID (local CIELAB "
                          "statistics)  [default: the backbone's embedding; its patches for patch-knn]."),
        click.option("--backbone", default=None,
                     help=f"Backbone id from the manifest (see `oddling backbones list`) [default: {DEFAULT_BACKBONE}]."),
        click.option("--detector", type=click.Choice(list(DETECTORS)), default=DEFAULT_DETECTOR, show_default=True,
                     help="How a score is computed (see README, Detectors)."),
        click.option("--k", type=click.IntRange(min=1), default=None,
                     help="knn: neighbours averaged into each score [default: 5]."),
        click.option("--coreset", type=click.FloatRange(0, 1, min_open=True), default=None,
                     help="patch-knn: share of reference patches kept (greedy k-center) [default: 0.1]."),
        click.option("--param", "param_pairs", multiple=True, metavar="KEY=VALUE",
                     help="Any detector parameter, e.g. --param variance=0.99 for pca (repeatable)."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


frame_option = click.option(
    "--frame", type=click.Choice(["stretch", "pad", "crop"]), default="stretch", show_default=True,
    help="How an image meets the network's square input: stretch (every pixel in view), pad (aspect kept, "
         "the rest filled), crop (the centre square, as banks of earlier releases: a border defect is cut away).")


def _detector_params(detector: str, k, coreset, param_pairs, index=None) -> dict:
    params = parse_params(param_pairs)
    for name, value, owner in (("k", k, "knn"), ("coreset", coreset, "patch-knn"), ("index", index, "knn")):
        if value is not None:
            if detector != owner:
                raise OddlingError(f"--{name} applies to the {owner} detector, not {detector}")
            params[name] = value
    return params


@click.command()
@click.argument("reference_dir", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--bank", "bank_path", required=True, type=click.Path(path_type=Path),
              help="Folder to write the bank into.")
@detector_options
@click.option("--index", "index", type=click.Choice(["auto", "exact", "ivf", "hnsw"]), default=None,
              help=f"knn: how neighbours are found; auto = exact below {EXACT_BELOW:,} references, else "
                   f"{AUTO_APPROXIMATE.upper()} tuned to recall@k 0.95 (see README, Large collections) [default: auto].")
@click.option("--vector-dtype", type=click.Choice(["float32", "float16"]), default="float32", show_default=True,
              help="knn: store the reference vectors as float16 (half the disk and memory), refused unless it "
                   "moves scores by at most 1e-3, checked at fit (see README, Large collections).")
@frame_option
@calibration_options
@click.option("--force", is_flag=True, help="Replace an existing bank.")
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary to stdout.")
@dask_option
@run_options
@user_errors
def fit(reference_dir, bank_path, representation, backbone, detector, k, coreset, param_pairs, index, vector_dtype,
        frame, target_fpr, guarantee, confidence, allow_no_cutoff, force, as_json, **run):
    """Build a reference bank from REFERENCE_DIR, a folder of known-normal images."""
    refuse_existing(bank_path, force=force)
    bank = api.fit(reference_dir, bank_path, representation=representation, backbone=backbone, detector=detector,
                   params=_detector_params(detector, k, coreset, param_pairs, index), target_fpr=target_fpr,
                   guarantee=guarantee, confidence=confidence, allow_no_cutoff=allow_no_cutoff, force=force,
                   vector_dtype=vector_dtype, frame=frame, options=_options(**run))
    info = api.bank_info(bank_path)
    if as_json:
        _print_json(info | {"n_skipped": len(bank.skipped), "skipped": bank.skipped[:100]})
        return
    click.echo(fit_summary(bank, bank_path, info), err=True)
    if bank.skipped:
        click.echo(f"{plural(len(bank.skipped), 'file')} skipped (listed in {bank_path}/bank.json):", err=True)
        for item in bank.skipped[:10]:
            click.echo(f"  {item['path']}: {item['status']}", err=True)


def fit_summary(bank, bank_path, info: dict) -> str:
    """What fit says on stderr: the bank, its rate and promise (and why the rate is not 0.01), the score."""
    cutoff = bank.calibration["cutoff"]
    params = ", ".join(f"{key}={value}" for key, value in bank.detector.get_params().items())
    note = bank.calibration.get("note")
    return (f"Bank written to {bank_path}: {plural(bank.size, 'reference')}, representation "
            f"{bank.representation['id']}, detector {bank.detector.name} ({params}); cutoff "
            f"{'none' if cutoff is None else _num(cutoff, 4)} at target false-alarm rate {bank.target_fpr:g}"
            f" ({bank.calibration['promise']})." + (f"\n  {note}." if note else "")
            + f"\n  score: {bank.detector.describe_score()}\n  calibration: {bank.calibration['method']}; "
            f"{info['supported_rates']}.")


@click.command()
@click.argument("incoming_dir", type=click.Path(exists=True, file_okay=False, path_type=Path))
@bank_option
@click.option("--out", "out_csv", required=True, type=click.Path(path_type=Path),
              help="CSV to write, one row per file, highest score first.")
@target_fpr_override
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary to stdout.")
@click.option("--fail-on-flagged", is_flag=True, help="Exit 1 when any image is flagged.")
@click.option("--report", "report_path", type=click.Path(path_type=Path), default=None,
              help="Also write the review page (self-contained HTML) here.")
@click.option("--maps", "maps_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Local-mode banks: write a heatmap overlay PNG per image into this folder.")
@click.option("--force", is_flag=True, help="Overwrite existing output files.")
@click.option("--allow-empty", is_flag=True,
              help="A folder without one usable image is not an error (for pipelines): exit 0, rows say why.")
@click.option("--log", "log_path", is_flag=False, flag_value="", default=None, metavar="[PATH]",
              help="Also append every row to the scored-image log (PATH, or <bank>.log.sqlite beside the bank "
                   "when --log is given without one).")
@dask_option
@run_options
@user_errors
def score(incoming_dir, bank_path, out_csv, target_fpr, as_json, fail_on_flagged, report_path, maps_dir, force,
          allow_empty, log_path=None, **run):
    """Score every image in INCOMING_DIR against a bank."""
    check_output(out_csv, force=force, option="--out", example="scores.csv")
    check_output(report_path, force=force, option="--report", example="report.html")
    log = None
    if log_path is not None:   # opened first: a bad log path costs no scoring
        from oddling.logbook.store import open_log

        log = open_log(Path(log_path) if log_path else None, bank_path=bank_path)
    try:
        result = api.score(incoming_dir, bank_path, target_fpr=target_fpr, allow_empty=allow_empty,
                           require_cutoff=fail_on_flagged, options=_options(**run))
        result.write_csv(out_csv, force=True)
        summary = result.summary() | {"out": str(out_csv)}
        if log is not None:
            from oddling.logbook.records import log_score_result

            log_score_result(result, log)
            summary["log"] = str(log.path)
    finally:
        if log is not None:
            log.close()
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
            f"Scored {summary['n_scored']} of {plural(summary['n_files'], 'file')} "
            f"({summary['n_skipped']} unreadable or skipped); {summary['n_flagged']} flagged at "
            f"target false-alarm rate {summary['target_fpr']} ({summary['guarantee']}). Results: {out_csv}", err=True)
    if fail_on_flagged and summary["n_flagged"]:
        sys.exit(EXIT_ATTENTION)


@click.command()
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
@click.option("--report", "report_path", type=click.Path(path_type=Path), default=None,
              help="Also write the review page (self-contained HTML) here.")
@click.option("--force", is_flag=True, help="Overwrite earlier results in --out-dir.")
@dask_option
@run_options
@user_errors
def evaluate(test_dir, bank_path, out_dir, labels_csv, normal_labels, beta, target_fpr, as_json, report_path,
             force, **run):
    """Measure the detector on TEST_DIR, a folder of labelled images."""
    check_output(report_path, force=force, option="--report", example="report.html")
    result = api.evaluate(test_dir, bank_path, labels_csv=labels_csv, normal_labels=tuple(normal_labels),
                          beta=beta, target_fpr=target_fpr, options=_options(**run))
    paths = result.write(out_dir, force=force)
    for note in result.notes:
        click.echo(f"warning: {note}", err=True)
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
        if m.get("small_sample"):
            click.echo(f"Few images ({m['n_distinct_normal']} normal, {m['n_distinct_anomalous']} anomalous, copies "
                       f"counted once): the interval "
                       f"({m.get('auroc_ci_method', '')}) is wide; label more images before trusting these figures.",
                       err=True)
        if m["unreadable"]:
            click.echo(f"{plural(len(m['unreadable']), 'unreadable file')} listed in metrics.json (not counted).", err=True)


@click.command()
@click.argument("folder", required=False, type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--bank", "bank_path", type=click.Path(exists=True, file_okay=False, path_type=Path), default=None,
              help="Bank folder made by `oddling fit` (required, except with --log whose bank still exists).")
@click.option("--log", "log_path", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="Instead of FOLDER: rows of this scored-image log (with --since, --until or --last).")
@click.option("--since", default=None, help="With --log: rows logged at or after this time (ISO 8601, or 24h, 7d).")
@click.option("--until", default=None, help="With --log: rows logged before this time.")
@click.option("--last", type=click.IntRange(min=1), default=None, help="With --log: the newest N rows.")
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
@click.option("--allow-empty", is_flag=True,
              help="A folder without one usable image is not an error (for pipelines): exit 0, rows say why.")
@run_options
@user_errors
def report(folder, bank_path, log_path, since, until, last, out_html, labelled, labels_csv, normal_labels, top_n,
           target_fpr, force, allow_empty, **run):
    """Write the review page for FOLDER scored against a bank (cached embeddings make this quick), or for
    images in the scored-image log (--log)."""
    from oddling.reporting.page import write_report

    check_output(out_html, force=force, option="--out", example="report.html")
    if log_path is not None:
        from oddling.cli.service import bank_for_log, open_existing_log
        from oddling.jobs.log_report import report_rows
        from oddling.logbook.store import parse_time

        if folder is not None or labelled or labels_csv:
            raise OddlingError("--log reports logged rows: give no FOLDER, --labelled or --labels with it")
        with open_existing_log(log_path, None) as log:
            bank = api.load_bank(bank_for_log(log, bank_path))
            result, image_of = report_rows(log, bank, since=parse_time(since) if since else None,
                                           until=parse_time(until) if until else None, last=last)
        window = " ".join(p for p in (f"since {since}" if since else "", f"until {until}" if until else "",
                                      f"last {last}" if last else "") if p) or "all rows"
        path = write_report(out_html, result, top_n=top_n, force=True, image_of=image_of,
                            source_text=f"log {log_path} ({window})")
        click.echo(f"Review page: {path}", err=True)
        return
    if folder is None or bank_path is None:
        raise click.UsageError("give FOLDER and --bank, or --log LOG")
    options = _options(**run)
    if labelled or labels_csv:
        result = api.evaluate(folder, bank_path, labels_csv=labels_csv, normal_labels=tuple(normal_labels),
                              target_fpr=target_fpr, options=options)
        for note in result.notes:
            click.echo(f"warning: {note}", err=True)
        path = write_report(out_html, result, bank=result.bank, scored_root=folder, top_n=top_n, force=True)
    else:
        result = api.score(folder, bank_path, target_fpr=target_fpr, allow_empty=allow_empty, options=options)
        path = write_report(out_html, result, top_n=top_n, force=True)
    click.echo(f"Review page: {path}", err=True)




@click.command()
@click.argument("test_dir", required=False, type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--reference", "reference_dir", required=True, type=click.Path(exists=True, file_okay=False, path_type=Path),
              help="Folder of known-normal images every configuration is fitted on.")
@click.option("--bank", "bank_path", required=True, type=click.Path(path_type=Path),
              help="Folder to write the chosen configuration's bank into; the leaderboard goes beside it.")
@click.option("--synthetic", is_flag=True,
              help="With TEST_DIR: judge on synthetic anomalies too (made from held-out references). Without "
                   "TEST_DIR they are all there is.")
@click.option("--labels", "labels_csv", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="CSV with path,label instead of class subfolders.")
@click.option("--normal-label", "normal_labels", multiple=True, default=("normal",), show_default=True,
              help="Subfolder name that holds normal images (repeatable).")
@click.option("--representation", "representations", multiple=True,
              help="Representation to try (repeatable) [default: a grid of EfficientNet-Lite0 embedding, pooled "
                   "stages, patches, pixels:32 and colour:8].")
@click.option("--budget", "budget_minutes", type=click.FloatRange(min=0, min_open=True), default=None,
              help="Minutes the whole run may take: the race stops before a step that would overrun it and "
                   "keeps the best so far.")
@frame_option
@calibration_options
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of the splits and synthetic anomalies.")
@click.option("--json", "as_json", is_flag=True, help="Print the chosen configuration and leaderboard as JSON.")
@click.option("--force", is_flag=True, help="Replace an existing bank and leaderboard.")
@run_options
@user_errors
def tune(test_dir, reference_dir, bank_path, synthetic, labels_csv, normal_labels, representations, budget_minutes,
         frame, target_fpr, guarantee, confidence, allow_no_cutoff, seed, as_json, force, **run):
    """Find the representation and detector that best tell normal images from anomalies.

    With TEST_DIR, a labelled folder (as `evaluate` reads it), its anomalies decide; without it,
    synthetic anomalies made from a held-out share of the references (not your defects: confirm
    with `oddling evaluate` once labelled examples exist). Embeds on this machine (there is no
    --dask here: it times each representation on it)."""
    if test_dir is None and synthetic:
        raise OddlingError("--synthetic adds synthetic anomalies to a labelled TEST_DIR; without TEST_DIR they are "
                           "used anyway")
    result = api.tune(test_dir, reference_dir, bank_path, synthetic=synthetic, labels_csv=labels_csv,
                      normal_labels=tuple(normal_labels), representations=list(representations) or None,
                      budget_minutes=budget_minutes, frame=frame, target_fpr=target_fpr, guarantee=guarantee,
                      confidence=confidence, allow_no_cutoff=allow_no_cutoff, seed=seed, force=force,
                      options=_options(**run))
    summary = result.summary()
    for note in result.notes:
        click.echo(f"warning: {note}", err=True)
    if as_json:
        _print_json(summary)
        return
    click.echo(leaderboard_text(result))
    click.echo(tune_summary(result, summary, bank_path), err=True)


def leaderboard_text(result) -> str:
    """The leaderboard for stdout, a line per configuration, best first."""
    lines = [f"{'rank':>4}  {'AUROC':>6}  {'95% CI':>13}  {'ms/img':>7}  configuration"]
    for i, t in enumerate(result.leaderboard, 1):
        if t.auroc is None or t.auroc_ci95 is None:
            lines.append(f"{i:>4}  {'-':>6}  {'':>13}  {'':>7}  {t.representation} | {t.detector} {t.params}: "
                         f"{t.status}")
            continue
        low, high = t.auroc_ci95
        note = "  (cannot flag at the target rate)" if t.supports_target is False else ""
        if t.status != "ok":
            note += f"  ({t.status})"
        lines.append(f"{i:>4}  {t.auroc:6.3f}  {low:6.3f}-{high:6.3f}  {t.ms_per_image:7.1f}  "
                     f"{t.representation} | {t.detector} {t.params}{note}")
    return "\n".join(lines)


def tune_summary(result, summary: dict, bank_path) -> str:
    """What tune says on stderr after the leaderboard: the choice, its bank and how it was judged."""
    chosen, cal = result.chosen, result.chosen.bank.calibration
    kinds = ", ".join(f"{k} {_num(v)}" for k, v in sorted(result.holdout_per_kind.items()))
    synthetic = "synthetic" in result.chosen_on
    return (
        f"\nChosen on {result.chosen_on}: {chosen.representation} | {chosen.detector} {chosen.params}\n"
        f"  cutoff {'none' if cal['cutoff'] is None else _num(cal['cutoff'], 4)} at target false-alarm rate "
        f"{cal['target_fpr']:g} ({cal['promise']})" + (f"; {cal['note']}" if cal.get("note") else "") + "\n"
        f"  AUROC on the held-out half ({result.n_holdout['normal']} normal, {result.n_holdout['anomalous']} "
        f"anomalous): {_num(result.holdout_auroc)}" + (f"; by kind: {kinds}" if kinds else "") + "\n"
        f"  The leaderboard's AUROCs come from the half used to choose ({result.n_choose['normal']} normal, "
        f"{result.n_choose['anomalous']} anomalous): the best of them is optimistic.\n"
        + ("  Synthetic anomalies are not your defects: confirm the choice with `oddling evaluate` once labelled "
           "examples exist.\n" if synthetic else "")
        + f"  Bank: {bank_path}; leaderboard: {result.files['leaderboard_csv']}\n"
        f"  Reproduce: {summary['chosen']['fit_command']}"
        + ("\n  Stopped early: the budget ran out before every configuration was tried." if result.stopped_early
           else ""))
