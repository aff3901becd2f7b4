"""Whether long work shows a progress bar, and the bar: one switch that every floor can read.

The jobs decide (`RunOptions.progress`, `--quiet`); code deep below them (a detector's fit) only
asks for a bar, which is silent unless a job turned bars on around it.
"""
from __future__ import annotations

import sys
from contextlib import contextmanager
from contextvars import ContextVar

_shown: ContextVar[bool] = ContextVar("oddling_progress_shown", default=False)


@contextmanager
def progress_shown(enabled: bool = True):
    """Within this block, `bar()` draws on stderr when `enabled`."""
    token = _shown.set(bool(enabled))
    try:
        yield
    finally:
        _shown.reset(token)


def bar(total: int, desc: str, unit: str = "step"):
    """A tqdm bar on stderr, silent outside `progress_shown(True)`."""
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, disable=not _shown.get(), leave=False)
