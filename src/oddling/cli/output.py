"""What a command writes to the terminal and how it ends: user mistakes as one "Error: ..." line and exit
2 instead of a traceback, warnings as one line, Ctrl-C and SIGTERM as exit 130, numbers and JSON for people."""
from __future__ import annotations

import functools
import json
import signal
import sys
import threading
import warnings

import click

from oddling.errors import OddlingError

EXIT_ATTENTION = 1   # the job ran, and something a flag asked about needs attention
EXIT_BAD_INPUT = 2   # click's convention for usage errors; we use it for bad input too


def _show_warning(message, category, filename, lineno, file=None, line=None):
    click.echo(f"warning: {message}", err=True)


def _terminate(signum, frame):
    raise KeyboardInterrupt   # SIGTERM (a kill, a service stop) ends the run like Ctrl-C


def user_errors(func):
    """Turn user mistakes into a one-line message and exit code 2 instead of a traceback.

    SIGTERM is handled like Ctrl-C: the cache keeps the finished work, temporary files are
    removed, and the exit code is 130. Warnings print as one "warning: ..." line. Both hooks are
    put back as they were when the command ends, so a caller in the same process (the Python API
    after a CLI call, a test) gets its own again.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        shown_before = warnings.showwarning
        warnings.showwarning = _show_warning
        previous = None
        if threading.current_thread() is threading.main_thread() and hasattr(signal, "SIGTERM"):
            previous = signal.signal(signal.SIGTERM, _terminate)
        try:
            return func(*args, **kwargs)
        except OddlingError as exc:
            click.echo(f"Error: {exc}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except KeyboardInterrupt:
            click.echo("Interrupted.", err=True)
            sys.exit(130)
        finally:
            warnings.showwarning = shown_before
            if previous is not None:
                signal.signal(signal.SIGTERM, previous)

    return wrapper


def _num(value, digits: int = 3) -> str:
    """A metric for people: fixed decimals, or n/a where it is undefined (e.g. a CI from 1 sample)."""
    return "n/a" if value is None else f"{value:.{digits}f}"


def _print_json(data: dict) -> None:
    click.echo(json.dumps(data, indent=2, sort_keys=True))
