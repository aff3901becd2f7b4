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


def _images(folder: Path, n: int, seed: int = 0, size=(24, 24)) -> list[Path]:
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    paths = []
    for i in range(n):
        paths.append(folder / f"i{seed}_{i:03d}.png")
        Image.fromarray((rng.random((*size, 3)) * 255).astype(np.uint8)).save(paths[-1])
    return paths


def _stub_embed(root, paths, cache):
    """embed_files with the stand-in network of test_hostile (no real backbone)."""
    from oddling.embedding.runner import embed_files
    from test_hostile import _stub_backbone

    return embed_files(root, paths, _stub_backbone(), batch_size=2, progress=False, workers=1, cache=cache)


def _oddling_warnings(record) -> list[str]:
    from oddling.jobs.common import OddlingWarning

    return [str(w.message) for w in record if issubclass(w.category, OddlingWarning)]


def test_cache_on_a_full_disk_warns_once_and_the_run_goes_on(tmp_path, monkeypatch):
    import oddling.embedding.cache as cache_module
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", 7)
    expected = _stub_embed(tmp_path / "in", paths, None)
    monkeypatch.setattr(cache_module, "FLUSH_EVERY", 2)       # several chunk writes in one run
    cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    full_disk(monkeypatch, tmp_path / "cache")
    with pytest.warns(Warning) as record:
        embedded = _stub_embed(tmp_path / "in", paths, cache)
    monkeypatch.undo()
    [message] = _oddling_warnings(record)
    assert "no space left on device" in message and "goes on without" in message
    assert [r.status for r in embedded.records] == ["ok"] * 7
    np.testing.assert_array_equal(embedded.embeddings, expected.embeddings)
    assert not [p for p in leftovers(tmp_path / "cache") if "chunk" in p]      # no chunk, no .partial


def test_cache_folder_that_cannot_be_made_warns_and_the_run_goes_on(tmp_path):
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", 3)
    (tmp_path / "cache").write_text("a file where the cache folder should be")
    with pytest.warns(Warning) as record:
        cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
        embedded = _stub_embed(tmp_path / "in", paths, cache)
    assert len(_oddling_warnings(record)) == 1
    assert [r.status for r in embedded.records] == ["ok"] * 3
