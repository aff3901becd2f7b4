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
import contextlib
import errno
import io
import json
import os
import signal
import warnings
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
    from oddling.files import write_text

    (tmp_path / "scores.csv").write_text("old\n")
    full_disk(monkeypatch, tmp_path)
    with pytest.raises(OddlingError, match=r"no space left on device while writing .*scores.csv; nothing was replaced"):
        write_text(tmp_path / "scores.csv", "path,score\n", force=True)
    monkeypatch.undo()
    assert leftovers(tmp_path) == ["scores.csv"]
    assert (tmp_path / "scores.csv").read_text() == "old\n"     # the old file is untouched


def test_csv_written_to_dev_full_is_a_clear_error(tmp_path):
    from oddling.files import write_text

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
    from oddling.errors import OddlingWarning

    return [str(w.message) for w in record if issubclass(w.category, OddlingWarning)]


def _fill_up(cache) -> None:
    """The database can grow no more: SQLite's own "database or disk is full" (SQLITE_FULL) from
    now on, as on a full file system (max_page_count, SQLite docs "PRAGMA max_page_count")."""
    import sqlite3

    pages = cache._conn.execute("PRAGMA page_count").fetchone()[0]
    cache._conn.execute(f"PRAGMA max_page_count = {pages}")
    for i in range(10_000):     # then fill the pages it has (filler rows, not oddling's)
        try:
            cache._conn.execute("INSERT INTO features VALUES (?, ?, ?, ?)", (f"filler{i}", b"x" * 64, b"", b""))
        except sqlite3.OperationalError as exc:
            assert exc.sqlite_errorcode == sqlite3.SQLITE_FULL
            return


def test_cache_on_a_full_disk_warns_once_and_the_run_goes_on(tmp_path, monkeypatch):
    import oddling.embedding.cache as cache_module
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", 7)
    expected = _stub_embed(tmp_path / "in", paths, None)
    monkeypatch.setattr(cache_module, "FLUSH_EVERY", 2)       # several writes in one run
    cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    _fill_up(cache)
    with pytest.warns(Warning) as record:
        embedded = _stub_embed(tmp_path / "in", paths, cache)
    [message] = _oddling_warnings(record)
    assert "no space left on device" in message and "goes on without" in message
    assert [r.status for r in embedded.records] == ["ok"] * 7
    np.testing.assert_array_equal(embedded.embeddings, expected.embeddings)
    assert not cache.writable and _sql(cache.path, "SELECT COUNT(*) FROM features WHERE sha256 NOT LIKE "
                                       "'filler%'") == [(0,)]                    # nothing half written
    assert not [p for p in leftovers(tmp_path / "cache") if "partial" in p]


def test_cache_folder_that_cannot_be_made_warns_and_the_run_goes_on(tmp_path):
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", 3)
    (tmp_path / "cache").write_text("a file where the cache folder should be")
    with pytest.warns(Warning) as record:
        cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
        embedded = _stub_embed(tmp_path / "in", paths, cache)
    assert len(_oddling_warnings(record)) == 1
    assert [r.status for r in embedded.records] == ["ok"] * 3


# --- 2. damaged cache files ----------------------------------------------------------------------

def _write_legacy_chunk(cache, hashes, vectors, health, name=None) -> Path:
    """A chunk file as earlier releases wrote it (sha256, vectors, health, mac under the cache's key)."""
    import uuid

    hashes = np.array(hashes, dtype="U64")
    vectors, health = np.asarray(vectors, np.float32), np.asarray(health, np.float64)
    chunk = cache.folder / (name or f"chunk-{uuid.uuid4().hex}.npz")
    with open(chunk, "wb") as f:
        np.savez(f, sha256=hashes, vectors=vectors, health=health,
                 mac=np.array(cache._chunk_signature(hashes, vectors, health)))
    return chunk


def _warm_cache(tmp_path, n=5):
    """A cache folder holding one chunk file of an earlier release with `n` images' features."""
    from oddling.data.intake import sha256_file
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", n)
    reference = _stub_embed(tmp_path / "in", paths, None)
    cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    chunk = _write_legacy_chunk(cache, [sha256_file(p) for p in paths], reference.embeddings, reference.health)
    cache.close()
    return paths, reference, chunk


def _warm_store(tmp_path, n=5):
    """A cache whose database holds `n` images' features (written through the runner)."""
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", n)
    cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    reference = _stub_embed(tmp_path / "in", paths, cache)
    cache.close()
    assert len(EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")) == n
    return paths, reference, cache.path


def _sql(db: Path, statement: str, args=()):
    """Change the database behind oddling's back, with Python's own sqlite3 module."""
    import sqlite3

    conn = sqlite3.connect(db, isolation_level=None)
    try:
        return conn.execute(statement, args).fetchall()
    finally:
        conn.close()


def _rerun(tmp_path, paths, monkeypatch, dim=None):
    """Open the cache again and embed the same files, counting images the network sees."""
    from oddling.embedding.cache import EmbeddingCache
    from test_hostile import _stub_backbone

    seen = []
    stub = _stub_backbone()
    original = stub.embed
    stub.embed = lambda batch: (seen.append(len(batch)), original(batch))[1]
    monkeypatch.setattr("test_hostile._stub_backbone", lambda: stub)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub", dim=dim)
        embedded = _stub_embed(tmp_path / "in", paths, cache)
    return embedded, sum(seen), _oddling_warnings(record)


def _rewrite_chunk(chunk: Path, sign: bool = False, **arrays):
    """Change arrays of a chunk; with sign=True also sign it again with the cache's own key (what
    only someone who can read the key file can do)."""
    from oddling.embedding.cache import EmbeddingCache

    with np.load(chunk, allow_pickle=False) as data:
        content = {k: data[k] for k in data.files}
    content.update(arrays)
    if sign:
        signer = EmbeddingCache(chunk.parent)
        signer._key, _ = signer._secret()
        content["mac"] = np.array(signer._chunk_signature(content["sha256"], content["vectors"], content["health"]))
    with open(chunk, "wb") as f:
        np.savez(f, **content)


@pytest.mark.parametrize("damage", ["empty", "garbage", "truncated", "npy not npz", "no health",
                                    "vectors too short", "health rows too long", "NaN vector", "2-D hashes"])
def test_a_damaged_chunk_is_skipped_reported_once_and_recomputed(tmp_path, monkeypatch, damage):
    paths, reference, chunk = _warm_cache(tmp_path)
    with np.load(chunk, allow_pickle=False) as data:
        vectors, health, hashes = data["vectors"], data["health"], data["sha256"]
    if damage == "empty":
        chunk.write_bytes(b"")
    elif damage == "garbage":
        chunk.write_bytes(os.urandom(300))
    elif damage == "truncated":
        chunk.write_bytes(chunk.read_bytes()[:200])
    elif damage == "npy not npz":
        np.save(open(chunk, "wb"), vectors)
    elif damage == "no health":
        with open(chunk, "wb") as f:
            np.savez(f, sha256=hashes, vectors=vectors)
    elif damage == "vectors too short":
        _rewrite_chunk(chunk, vectors=np.ascontiguousarray(vectors[:, :2]))
    elif damage == "health rows too long":
        _rewrite_chunk(chunk, health=np.hstack([health, health]))
    elif damage == "NaN vector":
        _rewrite_chunk(chunk, sign=True,
                       vectors=np.where(np.arange(vectors.shape[1]) == 0, np.nan, vectors).astype(np.float32))
    elif damage == "2-D hashes":
        _rewrite_chunk(chunk, sha256=hashes.reshape(1, -1))
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch, dim=4)
    assert len(messages) == 1 and "damaged chunk" in messages[0], messages
    assert n_embedded == len(paths)                     # nothing came from the damaged chunk
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)
    assert not chunk.exists()                           # removed: the next run does not meet it again
    _, n_again, messages = _rerun(tmp_path, paths, monkeypatch)
    assert n_again == 0 and messages == []              # and what was recomputed was cached



def test_seventy_unreadable_chunks_are_one_warning_and_all_removed(tmp_path, monkeypatch):
    from oddling.embedding.cache import EmbeddingCache

    folder = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub").folder
    for i in range(70):
        (folder / f"chunk-{i:032x}.npz").write_bytes(b"" if i % 2 else b"PK\x03\x04 not a zip")
    paths = _images(tmp_path / "in", 3)
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch)   # raised "need at least one array"
    assert len(messages) == 1 and "and 69 more" in messages[0]
    assert n_embedded == 3 and [r.status for r in embedded.records] == ["ok"] * 3
    assert list(folder.glob("chunk-*.npz")) == []


def test_many_good_chunks_of_an_earlier_release_are_imported_once_with_every_vector(tmp_path, monkeypatch):
    from oddling.data.intake import sha256_file
    from oddling.embedding.cache import EmbeddingCache

    paths = _images(tmp_path / "in", 70)
    reference = _stub_embed(tmp_path / "in", paths, None)
    cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    for i, path in enumerate(paths):     # one chunk per image, as FLUSH_EVERY=1 wrote them
        _write_legacy_chunk(cache, [sha256_file(path)], reference.embeddings[i:i + 1], reference.health[i:i + 1])
    cache.close()
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch)
    assert n_embedded == 0 and messages == []
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)
    np.testing.assert_array_equal(embedded.health, reference.health)
    assert list(cache.folder.glob("chunk-*.npz")) == []            # imported, then removed
    assert len(EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")) == 70


# --- 2. through the command line: one line and exit 2 for a damaged bank, a warning for the cache --

def _cli(*args):
    from click.testing import CliRunner

    from oddling.cli import main

    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture()
def pixel_bank(tmp_path):
    """A bank of 12 tiny images with the pixels representation (no network, a second to fit)."""
    _images(tmp_path / "refs", 12)
    bank = tmp_path / "pix.bank"
    result = _cli("fit", tmp_path / "refs", "--bank", bank, "--representation", "pixels:16", "--target-fpr", "0.2",
                  "--cache-dir", tmp_path / "cache", "--quiet")
    assert result.exit_code == 0, result.output
    return bank


@pytest.mark.parametrize("damage", ["zero-byte chunk", "garbage database"])
def test_a_damaged_cache_file_is_a_warning_not_aborted(tmp_path, pixel_bank, damage):
    [db] = (tmp_path / "cache" / "embeddings").glob("*/features.sqlite")
    if damage == "zero-byte chunk":
        (db.parent / f"chunk-{0:032x}.npz").write_bytes(b"")      # was "Aborted!" (an EOFError), exit 1
    else:
        for suffix in ("-wal", "-shm"):
            Path(f"{db}{suffix}").unlink(missing_ok=True)
        db.write_bytes(os.urandom(4096))
    result = _cli("score", tmp_path / "refs", "--bank", pixel_bank, "--out", tmp_path / "s.csv",
                  "--cache-dir", tmp_path / "cache", "--quiet")
    assert result.exit_code == 0, result.output
    assert result.stderr.count("warning: ") == 1 and "damaged" in result.stderr
    assert "Aborted" not in result.stderr


@pytest.mark.parametrize("name", ["features.npy", "calibration_scores.npy", "health_stats.npy", "bank.json"])
def test_a_zero_byte_bank_file_is_one_line_and_exit_2(tmp_path, pixel_bank, name):
    (pixel_bank / name).write_bytes(b"")
    result = _cli("score", tmp_path / "refs", "--bank", pixel_bank, "--out", tmp_path / "s.csv", "--quiet",
                  "--cache-dir", tmp_path / "cache")
    assert result.exit_code == 2
    [line] = result.stderr.strip().splitlines()
    assert line.startswith("Error: ") and name in line and "Traceback" not in result.output


# --- 3. cache poisoning ---------------------------------------------------------------------------

def test_a_chunk_with_chosen_vectors_cannot_hide_an_image(tmp_path, monkeypatch):
    paths, reference, chunk = _warm_cache(tmp_path)
    with np.load(chunk, allow_pickle=False) as data:
        vectors = data["vectors"]
    # The attack: keep the content hashes, give every image the first image's vector (a normal-
    # looking one), keep the arrays well formed. Without a signature it was trusted as it was.
    _rewrite_chunk(chunk, vectors=np.repeat(vectors[:1], len(vectors), axis=0))
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch, dim=4)
    assert n_embedded == len(paths) and len(messages) == 1 and "signature does not match" in messages[0]
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)


def _rows(db: Path) -> list[tuple]:
    return _sql(db, "SELECT sha256, vector, health, mac FROM features ORDER BY sha256")


def _resign(db: Path, digest: str, vector: bytes, health: bytes) -> bytes:
    """The row MAC oddling would write: what only someone who can read the key file can make."""
    from oddling.embedding.cache import EmbeddingCache

    signer = EmbeddingCache(db.parent)
    signer._key, _ = signer._secret()
    return signer._mac(digest, vector, health)


@pytest.mark.parametrize("damage", ["one byte of a vector", "vector too short", "health row too long",
                                    "signature emptied", "NaN vector (signed)", "one vector for every image",
                                    "vectors swapped between images", "hashes moved to other vectors",
                                    "text where a vector was"])
def test_a_damaged_or_poisoned_row_is_skipped_reported_once_and_recomputed(tmp_path, monkeypatch, damage):
    paths, reference, db = _warm_store(tmp_path)
    rows = _rows(db)
    digest, vector, health, mac = rows[0]
    changed = 1
    if damage == "one byte of a vector":
        _sql(db, "UPDATE features SET vector = ? WHERE sha256 = ?",
             (vector[:5] + bytes([vector[5] ^ 0x01]) + vector[6:], digest))
    elif damage == "vector too short":
        _sql(db, "UPDATE features SET vector = ? WHERE sha256 = ?", (vector[:8], digest))
    elif damage == "health row too long":
        _sql(db, "UPDATE features SET health = ? WHERE sha256 = ?", (health + health, digest))
    elif damage == "signature emptied":
        _sql(db, "UPDATE features SET mac = ? WHERE sha256 = ?", (b"", digest))
    elif damage == "NaN vector (signed)":
        bad = np.frombuffer(vector, "<f4").copy()
        bad[0] = np.nan
        bad = bad.astype("<f4").tobytes()
        _sql(db, "UPDATE features SET vector = ?, mac = ? WHERE sha256 = ?", (bad, _resign(db, digest, bad, health),
                                                                             digest))
    elif damage == "one vector for every image":    # the attack: every image looks like one normal one
        _sql(db, "UPDATE features SET vector = ?", (vector,))
        changed = len(rows) - 1
    elif damage == "vectors swapped between images":
        for (d, _, _, _), (_, v, _, _) in zip(rows, rows[::-1]):
            _sql(db, "UPDATE features SET vector = ? WHERE sha256 = ?", (v, d))
        changed = len(rows) - len(rows) % 2
    elif damage == "hashes moved to other vectors":
        _sql(db, "DELETE FROM features")
        for (d, *_), (_, v, h, m) in zip(rows, rows[1:] + rows[:1]):
            _sql(db, "INSERT INTO features VALUES (?, ?, ?, ?)", (d, v, h, m))
        changed = len(rows)
    elif damage == "text where a vector was":
        _sql(db, "UPDATE features SET vector = 'abc' WHERE sha256 = ?", (digest,))
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch, dim=4)
    assert len(messages) == 1 and "damaged entries" in messages[0], messages
    assert n_embedded == changed                         # nothing came from a damaged row
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)
    _, n_again, messages = _rerun(tmp_path, paths, monkeypatch)
    assert n_again == 0 and messages == []               # removed, and what was recomputed was cached
    assert len(_rows(db)) == len(paths)


def test_an_unsigned_chunk_from_an_earlier_release_is_recomputed(tmp_path, monkeypatch):
    paths, reference, chunk = _warm_cache(tmp_path)
    with np.load(chunk, allow_pickle=False) as data:
        content = {k: data[k] for k in ("sha256", "vectors", "health")}
    with open(chunk, "wb") as f:
        np.savez(f, **content)          # the chunk layout before signatures
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch)
    assert n_embedded == len(paths) and "not signed" in messages[0]
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)


def test_a_chunk_moved_to_another_cache_key_does_not_verify(tmp_path, monkeypatch):
    from oddling.embedding.cache import KEY_FILE, EmbeddingCache

    paths, reference, chunk = _warm_cache(tmp_path)
    other = EmbeddingCache.open(tmp_path / "cache", {"id": "other"}, "stub").folder
    (other / KEY_FILE).write_bytes((chunk.parent / KEY_FILE).read_bytes())   # even with the same key
    os.replace(chunk, other / chunk.name)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        moved = EmbeddingCache.open(tmp_path / "cache", {"id": "other"}, "stub")
    assert len(moved) == 0 and "signature does not match" in _oddling_warnings(record)[0]


def test_a_database_copied_to_another_cache_key_does_not_verify(tmp_path, monkeypatch):
    import shutil

    from oddling.data.intake import sha256_file
    from oddling.embedding.cache import DB_FILE, KEY_FILE, EmbeddingCache

    paths, reference, db = _warm_store(tmp_path)
    other = EmbeddingCache.open(tmp_path / "cache", {"id": "other"}, "stub")
    other.close()
    (other.folder / KEY_FILE).write_bytes((db.parent / KEY_FILE).read_bytes())   # even with the same key
    shutil.copy(db, other.folder / DB_FILE)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        moved = EmbeddingCache.open(tmp_path / "cache", {"id": "other"}, "stub")
        assert moved.get_many([sha256_file(p) for p in paths]) == {}
    [message] = _oddling_warnings(record)
    assert "signature does not match" in message
    assert len(moved) == 0                                         # and the rows were removed


def test_a_signed_chunk_must_still_hold_finite_and_if_asked_unit_vectors(tmp_path, monkeypatch):
    from oddling.embedding.cache import EmbeddingCache

    paths, reference, chunk = _warm_cache(tmp_path)
    with np.load(chunk, allow_pickle=False) as data:
        vectors = data["vectors"]
    _rewrite_chunk(chunk, sign=True, vectors=vectors * 3)        # signed, but not unit length
    with np.load(chunk, allow_pickle=False) as data:
        hashes = [str(h) for h in data["sha256"]]
    loose = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    found = loose.get_many(hashes)                                # unit_norm=False: taken as they are
    np.testing.assert_array_equal(np.stack([found[h][0] for h in hashes]), vectors * 3)
    loose.close()
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        strict = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub", unit_norm=True)
        assert strict.get_many(hashes) == {}
    assert "not of unit length" in _oddling_warnings(record)[0]
    strict.add("f" * 64, np.array([3.0, 0, 0, 0], np.float32), np.zeros(len(reference.health[0])))
    strict.add("e" * 64, np.array([np.nan, 0, 0, 0], np.float32), np.zeros(len(reference.health[0])))
    assert strict._pending == {}                                  # neither is saved
    strict.add("d" * 64, np.array([0.6, 0.8, 0, 0], np.float32), np.zeros(len(reference.health[0])))
    assert list(strict._pending) == ["d" * 64]


@pytest.mark.skipif(not hasattr(os, "geteuid"), reason="POSIX owners and modes")
def test_the_key_is_made_private_on_first_use_even_with_an_open_umask(tmp_path):
    from oddling.embedding.cache import KEY_BYTES, KEY_FILE, EmbeddingCache

    old = os.umask(0)
    try:
        folder = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub").folder
    finally:
        os.umask(old)
    info = (folder / KEY_FILE).stat()
    assert oct(info.st_mode & 0o777) == oct(0o600) and info.st_uid == os.geteuid()
    assert len((folder / KEY_FILE).read_bytes()) == KEY_BYTES
    # no temporary key file left; beside the key only the database (and SQLite's WAL files)
    assert {p.name for p in folder.iterdir()} <= {KEY_FILE, "features.sqlite", "features.sqlite-wal",
                                                  "features.sqlite-shm"}


@pytest.mark.skipif(not hasattr(os, "geteuid"), reason="POSIX owners and modes")
@pytest.mark.parametrize("damage", ["readable by others", "wrong length", "symbolic link"])
def test_a_key_that_is_not_private_is_replaced_and_its_rows_recomputed(tmp_path, monkeypatch, damage):
    from oddling.embedding.cache import KEY_FILE

    paths, reference, db = _warm_store(tmp_path)
    key = db.parent / KEY_FILE
    if damage == "readable by others":
        key.chmod(0o644)
    elif damage == "wrong length":
        key.write_bytes(b"short")
    else:
        (tmp_path / "known.key").write_bytes(key.read_bytes())   # a key someone else can read
        key.unlink()
        key.symlink_to(tmp_path / "known.key")
    embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch)
    assert len(messages) == 1 and "a new key was made" in messages[0], messages
    assert n_embedded == len(paths)
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)
    assert not key.is_symlink() and oct(key.stat().st_mode & 0o777) == oct(0o600)
    _, n_again, messages = _rerun(tmp_path, paths, monkeypatch)
    assert n_again == 0 and messages == []


@contextlib.contextmanager
def _at_most(seconds: int):
    """Fail the test instead of hanging it: SIGALRM interrupts a blocked open(2)."""
    def stop(signum, frame):
        raise AssertionError(f"blocked for {seconds} s")

    previous = signal.signal(signal.SIGALRM, stop)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="POSIX FIFOs")
@pytest.mark.parametrize("name", ["cache.key", "features.sqlite"])
def test_a_fifo_in_place_of_the_key_or_the_database_does_not_block_the_run(tmp_path, monkeypatch, name):
    # Found by tests/hostile_campaign.py ("key file a FIFO", "a FIFO where the database should be"):
    # opening either to read waited for a writer that never came, and the run hung.
    paths, reference, db = _warm_store(tmp_path)
    target = db.parent / name
    target.unlink()
    os.mkfifo(target)
    with _at_most(60):
        embedded, n_embedded, messages = _rerun(tmp_path, paths, monkeypatch)
    assert len(messages) == 1 and "not a regular file" in messages[0], messages
    assert n_embedded == len(paths)
    np.testing.assert_array_equal(embedded.embeddings, reference.embeddings)
    assert target.is_file()                              # a working key or database in its place
    _, n_again, messages = _rerun(tmp_path, paths, monkeypatch)
    assert n_again == 0 and messages == []


# --- 4. two writers of one bank -------------------------------------------------------------------

def _child_env() -> dict:
    import oddling

    src = str(Path(oddling.__file__).resolve().parents[1])
    return dict(os.environ, PYTHONPATH=os.pathsep.join([src] + [p for p in [os.environ.get("PYTHONPATH")] if p]))


def _waiting_for_a_lock(pid: int) -> bool:
    """Whether process `pid` is blocked waiting for a file lock, as the kernel lists it in
    /proc/locks (a line "N: -> FLOCK ADVISORY WRITE <pid> ..." for each waiter; proc(5))."""
    with open("/proc/locks") as f:
        return any(len(parts) > 5 and parts[1] == "->" and parts[5] == str(pid)
                   for parts in (line.split() for line in f))


def _wait_until_blocked_or_done(proc) -> None:
    import time

    for _ in range(6000):        # a bound so a broken build fails instead of hanging; not a timing check
        if proc.poll() is not None or _waiting_for_a_lock(proc.pid):
            return
        time.sleep(0.05)
    raise AssertionError("the second writer neither finished nor waited for the lock")


needs_proc_locks = pytest.mark.skipif(not os.path.exists("/proc/locks"), reason="needs Linux /proc/locks")


@needs_proc_locks
def test_bank_lock_makes_a_second_process_wait_and_leaves_no_lock_file(tmp_path):
    import subprocess
    import sys

    from oddling.bank.store import bank_lock, lock_path

    bank = tmp_path / "b.bank"
    script = ("import sys; from oddling.bank.store import bank_lock\n"
              "with bank_lock(sys.argv[1]):\n    print(open(sys.argv[2]).read())\n")
    note = tmp_path / "note"
    note.write_text("before")
    with bank_lock(bank):
        with bank_lock(bank):      # re-entrant: save_bank inside bank add takes it again
            assert lock_path(bank).exists()
        child = subprocess.Popen([sys.executable, "-c", script, str(bank), str(note)], stdout=subprocess.PIPE,
                                 text=True, env=_child_env())
        _wait_until_blocked_or_done(child)
        assert child.poll() is None            # it waits: we hold the lock
        note.write_text("after")               # what the holder wrote before releasing
    out, _ = child.communicate()
    assert child.returncode == 0 and out.strip() == "after"
    assert not lock_path(bank).exists()


@needs_proc_locks
def test_two_bank_adds_at_once_keep_both_sides(tmp_path, monkeypatch, pixel_bank):
    import subprocess
    import sys

    import oddling
    import oddling.jobs.maintenance as maintenance
    from oddling.bank.store import load_bank

    ours = _images(tmp_path / "ours", 3, seed=1)
    theirs = _images(tmp_path / "theirs", 3, seed=2)
    real_save = maintenance.save_bank
    started = []

    def save_while_another_writer_runs(bank, path, force=False):
        # Between our read of the bank and our save, a second `bank add` starts in another
        # process. Without the lock it read the old bank too, and one of the two saves was lost.
        child = subprocess.Popen(
            [sys.executable, "-m", "oddling.cli", "bank", "add", str(pixel_bank), str(tmp_path / "theirs"),
             "--quiet", "--cache-dir", str(tmp_path / "cache")],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_child_env())
        started.append(child)
        _wait_until_blocked_or_done(child)
        return real_save(bank, path, force)

    monkeypatch.setattr(maintenance, "save_bank", save_while_another_writer_runs)
    oddling.bank_add(pixel_bank, tmp_path / "ours", options=oddling.RunOptions(progress=False,
                                                                                cache_dir=tmp_path / "cache"))
    [child] = started
    out, err = child.communicate()
    assert child.returncode == 0, err
    paths = {Path(r["path"]).name for r in load_bank(pixel_bank).references}
    assert {p.name for p in ours + theirs} <= paths and len(paths) == 12 + 6


# --- 5. a crash between the two renames of a save -------------------------------------------------

CRASHING_SAVE = """
import os, sys
import oddling.bank.store as store
from test_bank import small_bank

target, where = sys.argv[1], sys.argv[2]
real_replace = os.replace

def replace(src, dst):
    if where == "between renames" and ".writing-" in os.fspath(src) and not os.path.exists(dst):
        os._exit(137)                     # as if killed (-9) after the bank was moved aside
    if where == "after renames" and ".old-" in os.fspath(src):
        os._exit(137)                     # killed after the new bank is in place
    return real_replace(src, dst)

store.os.replace = replace
bank = small_bank()
bank.tool_version = "2.0.0"
store.save_bank(bank, target, force=True)
"""


def _crash_a_save(tmp_path, where: str) -> Path:
    import subprocess
    import sys

    from oddling.bank.store import save_bank
    from test_bank import small_bank

    target = tmp_path / "b"
    save_bank(small_bank(), target)                  # tool_version 0.1.0
    env = _child_env()
    env["PYTHONPATH"] += os.pathsep + str(Path(__file__).parent)
    done = subprocess.run([sys.executable, "-c", CRASHING_SAVE, str(target), where], env=env)
    assert done.returncode == 137
    return target


def test_a_crash_between_the_two_renames_is_undone_on_the_next_load(tmp_path):
    from oddling.bank.store import load_bank
    from oddling.errors import OddlingWarning

    target = _crash_a_save(tmp_path, "between renames")
    assert not target.exists()                                         # the state the crash left
    assert any(n.startswith(".b.old-") for n in os.listdir(tmp_path))
    with pytest.warns(OddlingWarning, match="half replaced"):
        bank = load_bank(target)
    assert bank.tool_version == "0.1.0"                               # the bank before the failed save
    assert os.listdir(tmp_path) == ["b"]                               # no .writing-*, no .old-*, no lock


def test_the_cli_puts_back_a_half_replaced_bank_too(tmp_path):
    # The bank path is not required to exist on the command line: the folder a crashed save
    # renamed aside is put back by the command itself, as by load_bank.
    from click.testing import CliRunner

    from oddling.cli import main

    target = _crash_a_save(tmp_path, "between renames")
    assert not target.exists()
    result = CliRunner().invoke(main, ["bank", "info", str(target), "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["tool_version"] == "0.1.0"
    assert os.listdir(tmp_path) == ["b"]
    missing = CliRunner().invoke(main, ["bank", "info", str(tmp_path / "never")])
    assert missing.exit_code == 2 and "does not exist" in missing.output


def test_a_crash_between_the_two_renames_is_undone_by_the_next_save(tmp_path):
    from oddling.bank.store import load_bank, save_bank
    from test_bank import small_bank

    target = _crash_a_save(tmp_path, "between renames")
    with pytest.warns(Warning), pytest.raises(OddlingError, match="already exists"):
        save_bank(small_bank(), target)                                # the old bank is back: needs --force
    assert load_bank(target).tool_version == "0.1.0"
    assert os.listdir(tmp_path) == ["b"]


def test_a_crash_after_the_renames_leaves_the_replaced_bank_as_the_previous_version(tmp_path):
    import oddling
    from oddling.bank.store import load_bank, save_bank
    from test_bank import small_bank

    target = _crash_a_save(tmp_path, "after renames")
    assert load_bank(target).tool_version == "2.0.0"                   # the new bank made it
    assert any(n.startswith(".b.old-") for n in os.listdir(tmp_path))
    oddling.bank_undo(target)                                          # the leftover is the previous version
    assert load_bank(target).tool_version == "0.1.0"
    save_bank(small_bank(), target, force=True)
    assert sorted(os.listdir(tmp_path)) == [".b.previous", "b"]


def test_leftovers_of_a_live_writer_are_not_touched(tmp_path):
    from oddling.bank.store import save_bank
    from test_bank import small_bank

    save_bank(small_bank(), tmp_path / "b")
    live = tmp_path / f".b.writing-{os.getppid()}-x"                   # the parent process: alive
    live.mkdir()
    save_bank(small_bank(), tmp_path / "b", force=True)
    assert live.is_dir()


# --- 6. the previous bank is kept, and `bank undo` puts it back ----------------------------------

def _versions(tmp_path, *versions):
    from oddling.bank.store import save_bank
    from test_bank import small_bank

    for i, version in enumerate(versions):
        bank = small_bank()
        bank.tool_version = version
        save_bank(bank, tmp_path / "b", force=i > 0)
    return tmp_path / "b"


def test_a_replaced_bank_is_kept_one_level_deep(tmp_path):
    from oddling.bank.store import load_bank, previous_path

    target = _versions(tmp_path, "1", "2", "3")
    assert load_bank(target).tool_version == "3"
    assert load_bank(previous_path(target)).tool_version == "2"        # "1" is gone: one level only
    assert sorted(os.listdir(tmp_path)) == [".b.previous", "b"]


def test_bank_undo_swaps_in_the_previous_version_and_again_swaps_back(tmp_path):
    import oddling
    from oddling.bank.store import HISTORY_FILE, load_bank, previous_path

    target = _versions(tmp_path, "1", "2")
    (target / HISTORY_FILE).write_text('{"check": 1}\n')
    result = oddling.bank_undo(target)
    assert result["n_references"] == 6 and load_bank(target).tool_version == "1"
    assert load_bank(previous_path(target)).tool_version == "2"
    assert (target / HISTORY_FILE).read_text() == '{"check": 1}\n'     # the drift history stays in place
    oddling.bank_undo(target)
    assert load_bank(target).tool_version == "2"
    assert sorted(os.listdir(tmp_path)) == [".b.previous", "b"]


def test_bank_undo_without_a_previous_version_is_a_clear_error(tmp_path):
    import oddling

    target = _versions(tmp_path, "1")
    with pytest.raises(OddlingError, match="no previous version"):
        oddling.bank_undo(target)


def test_bank_undo_refuses_a_damaged_previous_version_and_moves_nothing(tmp_path):
    import oddling
    from oddling.bank.store import load_bank, previous_path

    target = _versions(tmp_path, "1", "2")
    (previous_path(target) / "features.npy").write_bytes(b"")
    with pytest.raises(OddlingError, match="damaged"):
        oddling.bank_undo(target)
    assert load_bank(target).tool_version == "2"


def test_bank_add_remove_and_fit_force_keep_the_previous_bank_for_undo(tmp_path, pixel_bank):
    from oddling.bank.store import load_bank

    before = {r["path"] for r in load_bank(pixel_bank).references}
    _images(tmp_path / "more", 2, seed=5)
    assert _cli("bank", "add", pixel_bank, tmp_path / "more", "--quiet", "--cache-dir", tmp_path / "cache").exit_code == 0
    assert len(load_bank(pixel_bank).references) == 14
    result = _cli("bank", "undo", pixel_bank)
    assert result.exit_code == 0 and "Restored the previous version" in result.stderr
    assert {r["path"] for r in load_bank(pixel_bank).references} == before
    removed = sorted(before)[0]
    assert _cli("bank", "remove", pixel_bank, removed).exit_code == 0
    assert _cli("bank", "undo", pixel_bank).exit_code == 0
    assert {r["path"] for r in load_bank(pixel_bank).references} == before
    _images(tmp_path / "other", 12, seed=6)
    refit = _cli("fit", tmp_path / "other", "--bank", pixel_bank, "--representation", "pixels:16", "--force",
                 "--target-fpr", "0.2", "--quiet", "--cache-dir", tmp_path / "cache")
    assert refit.exit_code == 0, refit.output
    assert {r["path"] for r in load_bank(pixel_bank).references} != before
    assert _cli("bank", "undo", pixel_bank).exit_code == 0
    assert {r["path"] for r in load_bank(pixel_bank).references} == before


def test_bank_undo_on_a_folder_without_a_bank_is_exit_2(tmp_path):
    result = _cli("bank", "undo", tmp_path / "nothing.bank")
    assert result.exit_code == 2 and result.stderr.startswith("Error: ") and "no previous version" in result.stderr


CRASHING_UNDO = """
import os, sys
import oddling.bank.store as store

target = sys.argv[1]
real_replace = os.replace

def replace(src, dst):
    if os.fspath(src).endswith(".previous") and not os.path.exists(dst):
        os._exit(137)                     # killed after the bank was moved aside
    return real_replace(src, dst)

store.os.replace = replace
store.restore_previous(target)
"""


def test_a_crash_in_the_middle_of_undo_leaves_the_bank_as_it_was(tmp_path):
    import subprocess
    import sys

    from oddling.bank.store import load_bank, previous_path

    target = _versions(tmp_path, "1", "2")
    done = subprocess.run([sys.executable, "-c", CRASHING_UNDO, str(target)], env=_child_env())
    assert done.returncode == 137 and not target.exists()
    with pytest.warns(Warning, match="half replaced"):
        assert load_bank(target).tool_version == "2"
    assert load_bank(previous_path(target)).tool_version == "1"


# --- 7. SIGTERM is Ctrl-C; bank folders follow the umask ------------------------------------------

@pytest.mark.skipif(not hasattr(os, "geteuid"), reason="POSIX signals")
def test_sigterm_stops_fit_like_ctrl_c_and_the_cache_keeps_the_finished_work(tmp_path):
    import re
    import signal
    import subprocess
    import sys

    from oddling.embedding.cache import EmbeddingCache

    _images(tmp_path / "refs", 300, size=(32, 32))
    proc = subprocess.Popen(
        [sys.executable, "-m", "oddling.cli", "fit", str(tmp_path / "refs"), "--bank", str(tmp_path / "b.bank"),
         "--runtime", "torch", "--batch-size", "8", "--workers", "1", "--cache-dir", str(tmp_path / "cache")],
        stderr=subprocess.PIPE, env=_child_env())
    seen = b""
    while True:               # wait (on the progress bar, no clock) until some images are embedded
        byte = proc.stderr.read(1)
        if not byte:
            break
        seen += byte
        done = [int(n) for n in re.findall(rb"(\d+)/300", seen)]
        if done and max(done) >= 16:
            proc.send_signal(signal.SIGTERM)
            break
    rest = proc.stderr.read()
    proc.wait()
    assert proc.returncode == 130, (seen + rest).decode(errors="replace")[-2000:]
    assert b"Interrupted." in rest and b"Traceback" not in seen + rest
    assert not (tmp_path / "b.bank").exists()
    [folder] = (tmp_path / "cache" / "embeddings").iterdir()
    cache = EmbeddingCache(folder)
    cache._start()
    assert len(cache) >= 16                              # flushed on the way out
    assert not [p for p in folder.iterdir() if "partial" in p.name]


@pytest.mark.skipif(not hasattr(os, "geteuid"), reason="POSIX modes")
@pytest.mark.parametrize("umask, mode", [(0o022, 0o755), (0o077, 0o700), (0o002, 0o775)])
def test_a_bank_folder_is_made_with_the_umask_like_mkdir(tmp_path, umask, mode):
    from oddling.bank.store import save_bank
    from test_bank import small_bank

    old = os.umask(umask)
    try:
        save_bank(small_bank(), tmp_path / "b")
        os.mkdir(tmp_path / "plain")                 # the outside reference: mkdir(2) under the same umask
    finally:
        os.umask(old)
    assert oct((tmp_path / "b").stat().st_mode & 0o777) == oct(mode)
    assert (tmp_path / "b").stat().st_mode & 0o777 == (tmp_path / "plain").stat().st_mode & 0o777


# --- leftovers of writers that were killed --------------------------------------------------------

def _dead_pid() -> int:
    import subprocess
    import sys

    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    return int(child.stdout)          # exited and reaped: no process has this id now


def test_partial_files_of_killed_writers_are_removed_on_the_next_write(tmp_path):
    from oddling.embedding.cache import EmbeddingCache
    from oddling.files import write_text

    dead, alive = _dead_pid(), os.getppid()
    for pid in (dead, alive):
        (tmp_path / f".scores.csv.partial-{pid}").write_text("half")
    write_text(tmp_path / "scores.csv", "path\n")
    assert sorted(os.listdir(tmp_path)) == [f".scores.csv.partial-{alive}", "scores.csv"]
    folder = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub").folder
    for pid in (dead, alive):
        (folder / f".chunk-{pid:032x}.npz.partial-{pid}").write_bytes(b"half")
    EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    assert sorted(p.name for p in folder.glob(".chunk-*")) == [f".chunk-{alive:032x}.npz.partial-{alive}"]


def test_a_half_replaced_bank_that_cannot_be_put_back_is_one_clear_error(tmp_path, monkeypatch):
    import oddling.bank.store as store
    from oddling.bank.store import load_bank

    target = _crash_a_save(tmp_path, "between renames")

    def refuse(src, dst):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    monkeypatch.setattr(store.os, "replace", refuse)          # a read-only file system
    with pytest.raises(OddlingError, match="half replaced .* cannot be put right"):
        load_bank(target)


def test_a_bank_saved_when_its_undo_copy_cannot_be_kept_warns_and_is_saved(tmp_path, monkeypatch):
    import oddling.bank.store as store
    from oddling.bank.store import load_bank
    from oddling.errors import OddlingWarning
    from test_bank import small_bank

    target = _versions(tmp_path, "1")

    def full(target, old):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(store, "_keep_as_previous", full)
    bank = small_bank()
    bank.tool_version = "2"
    with pytest.warns(OddlingWarning, match="could not be kept"):
        store.save_bank(bank, target, force=True)
    assert load_bank(target).tool_version == "2"
