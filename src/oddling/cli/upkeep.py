"""Keeping a bank healthy: shift checks, the reference audit, and changing a bank's references."""
from __future__ import annotations

import sys
from pathlib import Path

import click

from oddling import api
from oddling.cli.options import BANK_PATH, _options, bank_option, dask_option, run_options
from oddling.cli.output import EXIT_ATTENTION, _num, _print_json, user_errors
from oddling.data.intake import display_path
from oddling.files import check_output
from oddling.jobs.maintenance import AUDIT_KINDS, removal_targets
from oddling.numbers import plural

@click.command()
@click.argument("incoming_dir", required=False, type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--bank", "bank_path", type=BANK_PATH,
              help="Bank to compare the batch with.")
@click.option("--history", "history_bank", type=BANK_PATH,
              help="Instead of testing a batch: read this bank's history of checks (with --plot).")
@click.option("--plot", "plot_path", type=click.Path(path_type=Path),
              help="With --history: draw flagged share and MMD over time into this PNG.")
@click.option("--permutations", type=click.IntRange(min=19), default=500, show_default=True,
              help="Permutations for the MMD p-value.")
@click.option("--seed", type=int, default=0, show_default=True, help="Seed for subsampling and permutations.")
@click.option("--json", "as_json", is_flag=True, help="Print the statistics as JSON.")
@click.option("--fail-on-shift", is_flag=True, help="Exit 1 when the batch has shifted.")
@click.option("--log", "log_path", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="Instead of INCOMING_DIR: test images from this scored-image log (with --last or --since).")
@click.option("--last", type=click.IntRange(min=2), default=None, help="With --log: the newest N scored images.")
@click.option("--since", default=None, help="With --log: images logged at or after this time (ISO 8601, or 24h, 7d).")
@run_options
@user_errors
def drift(incoming_dir, bank_path, history_bank, plot_path, permutations, seed, as_json, fail_on_shift,
          log_path=None, last=None, since=None, **run):
    """Test whether the batch INCOMING_DIR as a whole (or the images in a log) has shifted away from the bank."""
    if plot_path is not None and history_bank is None:
        raise click.UsageError("--plot draws the history of checks: give it with --history BANK")
    if log_path is not None:
        from oddling.cli.service import bank_for_log, open_existing_log
        from oddling.jobs.monitoring import drift_over_log
        from oddling.logbook.store import parse_time

        if incoming_dir is not None or history_bank is not None:
            raise click.UsageError("--log tests logged images: give no INCOMING_DIR or --history with it")
        if (last is None) == (since is None):
            raise click.UsageError("with --log give one of --last N or --since TIME")
        with open_existing_log(log_path, None) as log:
            bank = api.load_bank(bank_for_log(log, bank_path))
            result = drift_over_log(log, bank, last=last, since=parse_time(since) if since else None,
                                    n_permutations=permutations, seed=seed, record=True, options=_options(**run))
    elif last is not None or since is not None:
        raise click.UsageError("--last and --since go with --log")
    if log_path is None and history_bank is not None:
        check_output(plot_path, force=True, suffix=".png", option="--plot", example="drift_history.png")
        entries = api.drift_history(history_bank)
        if plot_path is not None:
            from oddling.reporting.plots import plot_drift_history

            plot_drift_history(entries, entries[-1]["expected_share"], plot_path)
            click.echo(f"{plural(len(entries), 'check')} drawn in {plot_path}", err=True)
        if as_json:
            _print_json({"history": entries})
        elif plot_path is None:
            for e in entries:
                click.echo(f"{e['time']}  {'SHIFT   ' if e['shift'] else 'no shift'}  flagged {e['flagged_share']:.3f} "
                           f"(expected {e['expected_share']:g})  MMD {e['mmd']:.4f} p {e['mmd_p_value']:.4f}  {e['batch']}")
        return
    if log_path is None:
        if incoming_dir is None or bank_path is None:
            raise click.UsageError("give INCOMING_DIR and --bank, or --history BANK, or --log LOG")
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


@click.command()
@bank_option
@click.option("--json", "as_json", is_flag=True, help="Print the findings as JSON (input for `bank remove`).")
@click.option("--near-duplicate-factor", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=0.1,
              show_default=True, help="Near duplicate: cosine distance below this share of the median "
                                      "nearest-neighbour distance among the references.")
@click.option("--max-hash-bits", type=click.IntRange(0, 64), default=12, show_default=True,
              help="Near duplicate: perceptual hashes differing in at most this many of 256 bits.")
@user_errors
def audit(bank_path, as_json, near_duplicate_factor, max_hash_bits):
    """Check the reference set itself: outliers, duplicates, near duplicates, unhealthy frames."""
    result = api.audit(bank_path, near_duplicate_factor=near_duplicate_factor, max_hash_bits=max_hash_bits)
    if as_json:
        _print_json(result)
        return
    findings = result["findings"]
    if not findings:
        click.echo(f"No findings among {plural(result['n_references'], 'reference')}.")
    for f in findings:
        click.echo(f"{f['kind']:15s} {f['path']}: {f['detail']}")


@click.group("bank")
def bank_group():
    """Inspect a bank and change its references without rebuilding it."""


@bank_group.command("info")
@click.argument("bank_path", type=BANK_PATH)
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@user_errors
def bank_info(bank_path, as_json):
    """What BANK holds and how it was made."""
    info = api.bank_info(bank_path)
    if as_json:
        _print_json(info)
        return
    cal = info["calibration"]
    det = info["detector"]
    weights = info["backbone"].get("weights_sha256")
    click.echo(
        f"bank {info['path']} (format {info['format_version']}, made {info['created']} by oddling {info['tool_version']})\n"
        f"  representation {info['representation']['id']}"
        + (f" (weights SHA-256 {weights[:16]}...)" if weights else "") + "\n"
        f"  references {info['n_references']} from {info['reference_root']} ({plural(info['n_skipped'], 'file')} skipped)\n"
        f"  detector   {det['name']} {det['params']}: {det['score']}\n"
        f"  calibration {cal['method']}; {cal['n']} scores; cutoff {_num(cal['cutoff'], 4)} at target false-alarm "
        f"rate {cal['target_fpr']}\n  promise    {info['promise']}\n  {info['supported_rates']}\n"
        f"  vectors    {info['vector_dtype']}"
        + (f" (scores moved by at most {info['vector_check']['max_score_difference']:.2g} on "
           f"{info['vector_check']['n_checked']} references, checked at fit)" if info.get("vector_check") else "")
        + (f"\n  tuning     chosen by `oddling tune` on {info['tuning']['chosen_on']} (AUROC "
           f"{info['tuning'].get('auroc')} on the choosing half)" if info.get("tuning") else ""))


@bank_group.command("add")
@click.argument("bank_path", type=BANK_PATH)
@click.argument("source", type=click.Path(exists=True, path_type=Path))
@click.option("--root", type=click.Path(exists=True, file_okay=False, path_type=Path), default=None,
              help="Folder the decisions CSV's relative paths start from [default: the CSV's folder].")
@dask_option
@run_options
@user_errors
def bank_add(bank_path, source, root, **run):
    """Add SOURCE to BANK: a folder of normal images, or a report's decisions CSV (rows marked normal)."""
    result = api.bank_add(bank_path, source, root=root, options=_options(**run))
    click.echo(f"Added {plural(result['added'], 'reference')} ({result['already_in_bank']} already in the bank); "
               f"the bank now holds {plural(result['n_references'], 'reference')}.", err=True)
    if result["skipped"]:
        click.echo(f"{plural(len(result['skipped']), 'file')} unreadable or skipped:", err=True)
        for item in result["skipped"][:10]:
            click.echo(f"  {display_path(item['path'])}: {item['status']}", err=True)
        if len(result["skipped"]) > 10:
            click.echo(f"  and {len(result['skipped']) - 10} more", err=True)


@bank_group.command("remove")
@click.argument("bank_path", type=BANK_PATH)
@click.argument("items", nargs=-1, required=True)
@click.option("--kind", "kinds", multiple=True, type=click.Choice(AUDIT_KINDS),
              help="With an audit JSON: remove the findings of this kind (repeatable).")
@click.option("--all", "everything", is_flag=True, help="With an audit JSON: remove every finding.")
@click.option("--dry-run", is_flag=True, help="Print what would be removed and change nothing.")
@user_errors
def bank_remove(bank_path, items, kinds, everything, dry_run):
    """Remove references from BANK: their paths as `bank info`/`audit` show them, or an audit JSON file
    with --kind or --all. What goes is listed first."""
    targets = removal_targets(list(items), tuple(kinds), everything)

    def show(going):
        click.echo(f"{'Would remove' if dry_run else 'Removing'} {plural(len(going), 'reference')}:", err=True)
        for path in going:
            click.echo(f"  {display_path(path)}  ({', '.join(targets[path])})", err=True)

    result = api.bank_remove(bank_path, list(targets), dry_run=dry_run, before=show)
    if dry_run:
        click.echo(f"Dry run: nothing changed; the bank would hold {plural(result['n_references'], 'reference')}.",
                   err=True)
    else:
        click.echo(f"Removed {plural(result['removed'], 'reference')}; the bank now holds "
                   f"{plural(result['n_references'], 'reference')}.", err=True)


@bank_group.command("undo")
@click.argument("bank_path", type=click.Path(file_okay=False, path_type=Path))
@user_errors
def bank_undo(bank_path):
    """Put back the version of BANK that the last `bank add`, `bank remove` or `fit --force` replaced.

    The replaced version becomes the previous one, so running it again is a redo. BANK need not
    exist: a bank left half replaced by a crash is put right first.
    """
    result = api.bank_undo(bank_path)
    click.echo(f"Restored the previous version of {result['path']} (made {result['created']}, "
               f"{result['n_references']} references); `oddling bank undo` again goes back.", err=True)
