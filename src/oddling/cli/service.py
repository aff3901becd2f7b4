"""Commands for images that keep arriving: the HTTP service, the folder watcher, and the scored-image log."""
from __future__ import annotations

import socket
from pathlib import Path

import click

from oddling.backbones import RUNTIMES
from oddling.cli.options import BANK_PATH, bank_option, target_fpr_override
from oddling.cli.output import _print_json, user_errors
from oddling.data.intake import MAX_PIXELS_DEFAULT
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError


def _embedding_options(func):
    """The run options a long-running command takes (no progress bar, its own batch size)."""
    options = [
        click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
                     help="Folder for weights and caches [default: $ODDLING_CACHE_DIR or the user cache folder]."),
        click.option("--runtime", type=click.Choice(RUNTIMES), default="auto", show_default=True,
                     help="Inference runtime; auto = ONNX Runtime when installed, else PyTorch."),
        click.option("--no-cache", is_flag=True,
                     help="Neither reuse nor save embeddings (then `drift --log` can only re-embed files that still exist)."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


def _log_choice(bank_path: Path, log_path: Path | None, no_log: bool):
    from oddling.logbook.store import default_log_path

    if no_log:
        if log_path is not None:
            raise OddlingError("give --log or --no-log, not both")
        return None
    return log_path if log_path is not None else default_log_path(bank_path)


def _bind(host: str, port: int) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((host.strip("[]"), port))
    except OSError as exc:
        sock.close()
        raise OddlingError(f"cannot listen on {host}:{port}: {exc.strerror or exc}") from None
    sock.listen(2048)
    sock.set_inheritable(True)
    return sock


@click.command()
@bank_option
@click.option("--host", default="127.0.0.1", show_default=True,
              help="Address to listen on. Any address other than loopback needs --token-file.")
@click.option("--port", type=click.IntRange(0, 65535), default=8000, show_default=True,
              help="Port to listen on (0: any free port; the one chosen is printed).")
@click.option("--log", "log_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Scored-image log to append to [default: <bank>.log.sqlite beside the bank].")
@click.option("--no-log", is_flag=True, help="Keep no log (then /v1/drift is not available).")
@click.option("--token-file", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="File holding the bearer token every request but /v1/health must send.")
@click.option("--batch-size", type=click.IntRange(min=1), default=16, show_default=True,
              help="Images per network batch, at most (requests arriving together are batched).")
@click.option("--max-wait-ms", type=click.FloatRange(min=0), default=5.0, show_default=True,
              help="How long a batch waits for requests still being decoded.")
@click.option("--queue-size", type=click.IntRange(min=1), default=64, show_default=True,
              help="Requests that may wait for the model; beyond it: 503 with Retry-After.")
@click.option("--max-body-mb", type=click.FloatRange(min=0, min_open=True), default=32.0, show_default=True,
              help="Largest request body (MB); beyond it: 413.")
@click.option("--max-files", type=click.IntRange(min=1), default=64, show_default=True,
              help="Most images in one request.")
@click.option("--max-pixels", type=click.IntRange(min=1), default=MAX_PIXELS_DEFAULT, show_default=True,
              help="Largest image (pixels, from the header, before decoding).")
@click.option("--timeout", "timeout_s", type=click.FloatRange(min=0, min_open=True), default=30.0, show_default=True,
              help="Seconds a request may take, queueing included; beyond it: 504.")
@_embedding_options
@user_errors
def serve(bank_path, host, port, log_path, no_log, token_file, batch_size, max_wait_ms, queue_size, max_body_mb,
          max_files, max_pixels, timeout_s, cache_dir, runtime, no_cache):
    """Serve the bank over HTTP: POST images to /v1/score, read /v1/health, /v1/bank, /v1/drift, /metrics.

    The API is described at /docs (OpenAPI at /openapi.json).
    """
    import uvicorn

    from oddling.jobs.service import is_loopback, read_token_file, serve_app

    token = read_token_file(token_file) if token_file is not None else None
    if token is None and not is_loopback(host):
        raise OddlingError(f"refusing to listen on {host} without authentication: give --token-file, "
                           "or listen on 127.0.0.1")
    log = _log_choice(bank_path, log_path, no_log)
    app = serve_app(bank_path, log=log if log is not None else None, token=token, batch_size=batch_size,
                    max_wait_ms=max_wait_ms, queue_size=queue_size, max_body_bytes=int(max_body_mb * (1 << 20)),
                    max_files=max_files, max_pixels=max_pixels, timeout_s=timeout_s,
                    options=RunOptions(cache_dir=cache_dir, runtime=runtime, batch_size=batch_size,
                                       progress=False, use_cache=not no_cache))
    sock = _bind(host, port)
    bound = sock.getsockname()[1]
    config = uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on", timeout_graceful_shutdown=10)
    server = uvicorn.Server(config)
    engine = app.state.engine
    failed = []
    engine.on_failure = lambda message: (failed.append(message), setattr(server, "should_exit", True))
    shown = f"[{host}]" if ":" in host else host
    click.echo(f"oddling serve: http://{shown}:{bound}  bank {bank_path}  log {log or 'none'}  "
               f"auth {'bearer token' if token else 'none (loopback only)'}; loading the model...", err=True)
    try:
        server.run(sockets=[sock])
    finally:
        sock.close()
    if failed:
        raise OddlingError(f"the model could not be loaded: {failed[0]}")


@click.command()
@click.argument("incoming_dir", type=click.Path(exists=True, file_okay=False, path_type=Path))
@bank_option
@click.option("--log", "log_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Scored-image log [default: <bank>.log.sqlite beside the bank]; a restart resumes from it.")
@click.option("--no-log", is_flag=True, help="Keep no log (a restart then scores everything again).")
@click.option("--move-flagged", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Move flagged images into this folder (relative paths kept).")
@click.option("--poll-seconds", type=click.FloatRange(min=0), default=2.0, show_default=True,
              help="Seconds between looks at the folder.")
@click.option("--settle-seconds", type=click.FloatRange(min=0), default=1.0, show_default=True,
              help="A file is complete once unchanged over two looks and this long since it was last written.")
@click.option("--drift-every", type=click.IntRange(min=0), default=100, show_default=True,
              help="Run the shift test after every N scored images (0: never).")
@click.option("--drift-window", type=click.IntRange(min=2), default=200, show_default=True,
              help="The shift test looks at this many of the most recent images.")
@click.option("--max-files", type=click.IntRange(min=1), default=None,
              help="Stop once this many files have been logged.")
@click.option("--max-polls", type=click.IntRange(min=1), default=None, help="Stop after this many looks.")
@target_fpr_override
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON when stopping.")
@_embedding_options
@click.option("--batch-size", type=click.IntRange(min=1), default=32, show_default=True, help="Images per network call.")
@user_errors
def watch(incoming_dir, bank_path, log_path, no_log, move_flagged, poll_seconds, settle_seconds, drift_every,
          drift_window, max_files, max_polls, target_fpr, as_json, cache_dir, runtime, no_cache, batch_size):
    """Score images as they land in INCOMING_DIR; log each one once; warn when the stream shifts. Ctrl-C stops."""
    from oddling.jobs.watching import Watcher

    log = _log_choice(bank_path, log_path, no_log)
    watcher = Watcher(incoming_dir, bank_path, log=log, move_flagged=move_flagged, poll_seconds=poll_seconds,
                      settle_seconds=settle_seconds, drift_every=drift_every, drift_window=drift_window,
                      target_fpr=target_fpr,
                      options=RunOptions(cache_dir=cache_dir, runtime=runtime, batch_size=batch_size, progress=False,
                                         use_cache=not no_cache))
    click.echo(f"Watching {incoming_dir} (every {poll_seconds:g} s) against {bank_path}; log {log or 'none'}. "
               "Ctrl-C stops.", err=True)
    try:
        summary = watcher.run(max_files=max_files, max_polls=max_polls)
    finally:
        watcher.close()
    click.echo(f"Stopped: {summary['n_logged']} files logged, {summary['n_scored']} scored, "
               f"{summary['n_flagged']} flagged, {summary['shifts']} of {summary['shift_checks']} shift checks "
               "found a shift.", err=True)
    if as_json:
        _print_json(summary)


# ---- oddling log ... ---------------------------------------------------------------------------

def log_source_options(func):
    options = [
        click.option("--log", "log_path", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
                     help="The log file [default: the bank's, <bank>.log.sqlite]."),
        click.option("--bank", "bank_path", type=BANK_PATH,
                     default=None, help="Bank whose default log to read."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


def open_existing_log(log_path, bank_path):
    from oddling.logbook.store import open_log

    if log_path is None and bank_path is None:
        raise OddlingError("give --log LOG or --bank BANK")
    return open_log(log_path, bank_path=bank_path, create=False)


@click.group("log")
def log_group():
    """Read the scored-image log written by `score --log`, `serve` and `watch`."""


@log_group.command("export")
@log_source_options
@click.option("--since", default=None, help="Rows logged at or after this time (ISO 8601, no zone = UTC; or 24h, 7d).")
@click.option("--until", default=None, help="Rows logged before this time.")
@click.option("--last", type=click.IntRange(min=1), default=None, help="Only the newest N rows (of those chosen).")
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="File to write: .csv, or .parquet (needs pyarrow).")
@click.option("--force", is_flag=True, help="Overwrite an existing file.")
@user_errors
def log_export(log_path, bank_path, since, until, last, out_path, force):
    """Write rows of the log to a CSV (or Parquet) file."""
    from oddling.logbook.records import export_rows
    from oddling.logbook.store import parse_time

    with open_existing_log(log_path, bank_path) as log:
        rows = log.rows(since=parse_time(since) if since else None, until=parse_time(until) if until else None,
                        last=last)
        export_rows(rows, out_path, force=force)
    click.echo(f"{len(rows)} rows written to {out_path}", err=True)


@log_group.command("info")
@log_source_options
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@user_errors
def log_info(log_path, bank_path, as_json):
    """What the log holds: schema version, rows, time span, sources."""
    with open_existing_log(log_path, bank_path) as log:
        rows = log.rows()
        info = log.meta() | {"path": str(log.path), "n_rows": len(rows),
                             "first": rows[0].time if rows else None, "last": rows[-1].time if rows else None,
                             "sources": {s: sum(r.source == s for r in rows) for s in sorted({r.source for r in rows})},
                             "banks": sorted({r.bank for r in rows}), "integrity": log.integrity()}
    if as_json:
        _print_json(info)
        return
    click.echo(f"log {info['path']} (schema version {info['schema_version']}, integrity {info['integrity']}): "
               f"{info['n_rows']} rows from {info['first']} to {info['last']}; sources "
               + (", ".join(f"{k} {v}" for k, v in info["sources"].items()) or "none"))


def bank_for_log(log, bank_path):
    """The bank a log command compares with: --bank, else the bank the log recorded when it was created."""
    if bank_path is not None:
        return bank_path
    recorded = log.meta().get("bank")
    if recorded and Path(recorded).is_dir():
        return Path(recorded)
    raise OddlingError(f"give --bank: log {log.path} does not name a bank that exists"
                       + (f" ({recorded})" if recorded else ""))


__all__ = ["serve", "watch", "log_group", "bank_for_log", "open_existing_log"]
