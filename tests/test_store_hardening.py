"""Hardening of what oddling writes: a full disk, damaged and poisoned cache files, two writers of
one bank, a crash between the two renames of a save, the previous bank kept for undo, SIGTERM,
and the umask.

A full disk is simulated at the lowest level every writer shares: `open` (builtin and `io.open`)
hands out files whose `write` raises OSError(ENOSPC), as write(2) does on a full file system
(errno ENOSPC, POSIX.1-2017 "write"). /dev/full is the same error from the kernel; it is used
where a real write is wanted.
"""
from __future__ import annotations

import builtins
import errno
import io
import os
from pathlib import Path

import numpy as np
import pytest

from oddling.errors import OddlingError


class _FullFile:
    """A file opened for writing on a full disk: it exists, and every write fails with ENOSPC."""

    def __init__(self, inner):
        self._inner = inner

    def write(self, data):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def __getattr__(self, name):
        return getattr(self._inner, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._inner.close()
        return False

    def __iter__(self):
        return iter(self._inner)


def full_disk(monkeypatch, under: Path, names=None):
    """From now on, files opened for writing under `under` (whose name contains one of `names`,
    if given) are on a full disk. Reading is unaffected."""
    real_open = io.open
    under = str(under)

    def opener(file, mode="r", *args, **kwargs):
        handle = real_open(file, mode, *args, **kwargs)
        path = os.fsdecode(file) if isinstance(file, (str, bytes, os.PathLike)) else ""
        writing = any(c in mode for c in "wax+")
        if writing and path.startswith(under) and (names is None or any(n in Path(path).name for n in names)):
            return _FullFile(handle)
        return handle

    monkeypatch.setattr(builtins, "open", opener)
    monkeypatch.setattr(io, "open", opener)


def leftovers(folder: Path, keep=()) -> list[str]:
    """Every entry under `folder` except the ones named in `keep`."""
    return sorted(str(p.relative_to(folder)) for p in Path(folder).rglob("*") if p.name not in keep)


# --- 1. a full disk -----------------------------------------------------------------------------

def test_csv_on_a_full_disk_is_a_clear_error_and_leaves_no_partial_file(tmp_path, monkeypatch):
    from oddling.reporting.results import write_text

    (tmp_path / "scores.csv").write_text("old\n")
    full_disk(monkeypatch, tmp_path)
    with pytest.raises(OddlingError, match=r"no space left on device while writing .*scores.csv; nothing was replaced"):
        write_text(tmp_path / "scores.csv", "path,score\n", force=True)
    monkeypatch.undo()
    assert leftovers(tmp_path) == ["scores.csv"]
    assert (tmp_path / "scores.csv").read_text() == "old\n"     # the old file is untouched


def test_csv_written_to_dev_full_is_a_clear_error(tmp_path):
    from oddling.reporting.results import write_text

    if not os.path.exists("/dev/full"):
        pytest.skip("needs /dev/full (Linux)")
    # The kernel's own ENOSPC: the temporary file is /dev/full through a symbolic link.
    os.symlink("/dev/full", tmp_path / f".scores.csv.partial-{os.getpid()}")
    with pytest.raises(OddlingError, match="no space left on device while writing"):
        write_text(tmp_path / "scores.csv", "path,score\n" * 1000)
    assert not (tmp_path / "scores.csv").exists()


@pytest.mark.parametrize("names", [None, ["features"], ["bank.json"]], ids=["every file", "features", "bank.json"])
def test_bank_on_a_full_disk_is_a_clear_error_and_the_old_bank_stays(tmp_path, monkeypatch, names):
    from oddling.bank.store import load_bank, save_bank
    from test_bank import small_bank

    old = small_bank()
    save_bank(old, tmp_path / "b")
    before = {p.name: p.read_bytes() for p in (tmp_path / "b").iterdir()}
    new = small_bank()
    new.tool_version = "9.9.9"
    full_disk(monkeypatch, tmp_path, names)
    with pytest.raises(OddlingError, match=r"no space left on device while writing bank .*b; nothing was replaced"):
        save_bank(new, tmp_path / "b", force=True)
    with pytest.raises(OddlingError, match="no space left on device"):
        save_bank(new, tmp_path / "fresh")
    monkeypatch.undo()
    assert leftovers(tmp_path, keep=before) == ["b"]     # no .writing-* folder, no "fresh"
    assert {p.name: p.read_bytes() for p in (tmp_path / "b").iterdir()} == before
    assert load_bank(tmp_path / "b").tool_version == "0.1.0"
