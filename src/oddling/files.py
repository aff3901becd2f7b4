"""Writing files safely, for every floor: the one "already exists" check, atomic fsync'd writes, and
the temporary files of writers that were killed (found by their process id)."""
from __future__ import annotations

import errno
import os
from glob import escape as glob_escape
from pathlib import Path

from oddling.errors import OddlingError


def refuse_existing(*paths, force: bool) -> None:
    """The one "already exists" check: outputs are checked before any work starts, so a refusal costs nothing."""
    for path in paths:
        if path is not None and Path(path).exists() and not force:
            raise OddlingError(f"{path} already exists; pass --force to replace it")


def check_output(path, *, force: bool, suffix: str | None = None, option: str = "output",
                 example: str | None = None) -> Path | None:
    """The one output-path check for a file a command writes, made before any work starts.

    Refused with OddlingError: a folder (name a file in it instead: `example`), a name without
    `suffix` where the writer needs one (a plot is PNG), an existing file unless `force` (the
    "already exists" rule of refuse_existing), and a path below something that is not a folder.
    Missing parent folders are fine: the writers create them. None passes through (option not given).
    """
    if path is None:
        return None
    path = Path(path)
    wanted = f"a file name ending in {suffix}" if suffix else "a file name"
    if path.is_dir():
        raise OddlingError(f"{option} {path} is a folder; give {wanted}, e.g. {path / (example or 'output' + (suffix or ''))}")
    if suffix is not None and path.suffix.lower() != suffix:
        raise OddlingError(f"{option} {path}: give {wanted} (this writer makes {suffix[1:].upper()} files), "
                           f"e.g. {path.with_suffix(suffix) if path.suffix else path.with_name(path.name + suffix)}")
    refuse_existing(path, force=force)
    parent = path.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if parent.exists() and not parent.is_dir():
        raise OddlingError(f"{option} {path}: {parent} is a file, not a folder")
    return path


def pid_alive(pid: int) -> bool:
    """Whether process `pid` may still be running (the owner of a temporary file named after it)."""
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:        # exists, but not ours to signal
        return True
    try:                   # a killed child its parent has not reaped yet is dead too
        with open(f"/proc/{pid}/stat", "rb") as f:
            return f.read().rsplit(b")", 1)[-1].split()[0] != b"Z"
    except (OSError, IndexError):
        return True


def remove_stale_partials(folder: Path, pattern: str) -> None:
    """Remove the files in `folder` matching the glob `pattern` whose name ends in `-PID` of a
    process that is no longer running: what writers killed midway left behind."""
    for stale in Path(folder).glob(pattern):
        pid = stale.name.rsplit("-", 1)[-1]
        if pid.isdigit() and not pid_alive(int(pid)):
            try:
                stale.unlink()
            except OSError:
                pass


def write_text(path: Path, text: str, force: bool = False) -> Path:
    """Write a result file atomically (a temporary sibling, fsync'd, renamed into place), refusing to
    replace an existing one unless asked. A failed write raises OddlingError and replaces nothing."""
    path = Path(path)
    refuse_existing(path, force=force)
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    remove_stale_partials(path.parent, f".{glob_escape(path.name)}.partial-*")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(tmp, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())   # a full disk may only say so here
        os.replace(tmp, path)
    except BaseException as exc:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
        if not isinstance(exc, OSError):
            raise
        raise OddlingError(write_failure(str(path), exc)) from exc
    return path


def write_failure(what: str, exc: OSError) -> str:
    """The message for a write that failed and left the old file as it was."""
    if exc.errno == errno.ENOSPC:
        return f"no space left on device while writing {what}; nothing was replaced"
    return f"could not write {what} ({exc.strerror or exc}); nothing was replaced"


def save_array(path: Path, array) -> None:
    """np.save to `path`, flushed to the disk before returning (a full disk may only say so at fsync)."""
    import numpy as np

    with open(path, "wb") as f:
        np.save(f, array)
        f.flush()
        os.fsync(f.fileno())


__all__ = ["check_output", "pid_alive", "refuse_existing", "remove_stale_partials", "save_array", "write_failure",
           "write_text"]
