"""The embedding cache: re-runs cost only hashing, interrupted runs resume, shared caches stay correct."""
import hashlib
import multiprocessing
import os
import sqlite3
import tracemalloc
import warnings
from pathlib import Path

import numpy as np
import pytest

import oddling
from oddling.backbones import Backbone


class CountingEmbed:
    """Wraps Backbone.embed to count how many images reach the network; can stop the run midway."""

    def __init__(self, monkeypatch, stop_after_batches=None):
        self.images = 0
        self.batches = 0
        original = Backbone.embed
        counter = self

        def embed(backbone_self, batch):
            if stop_after_batches is not None and counter.batches >= stop_after_batches:
                raise KeyboardInterrupt   # what Ctrl-C does mid-run
            counter.batches += 1
            counter.images += len(batch)
            return original(backbone_self, batch)

        monkeypatch.setattr(Backbone, "embed", embed)


def opts(cache, **kw):
    return oddling.RunOptions(cache_dir=cache, progress=False, batch_size=16, **kw)


@pytest.fixture()
def reference_csv(digits_folders, digits_bank, tmp_path):
    """Scores computed without any cache: what every cached run must reproduce byte for byte."""
    result = oddling.score(digits_folders["incoming"], digits_bank, options=opts(tmp_path / "none", use_cache=False))
    return result.to_csv()


def test_second_run_embeds_nothing(digits_folders, digits_bank, tmp_path, monkeypatch, reference_csv):
    cache = tmp_path / "cache"
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    counter = CountingEmbed(monkeypatch)
    again = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    assert counter.images == 0
    assert again.to_csv() == reference_csv


def test_interrupted_run_resumes_without_recomputing(digits_folders, digits_bank, tmp_path, monkeypatch,
                                                      reference_csv):
    cache = tmp_path / "cache"
    n_files = len(list(digits_folders["incoming"].iterdir()))
    CountingEmbed(monkeypatch, stop_after_batches=2)
    with pytest.raises(KeyboardInterrupt):
        oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    monkeypatch.undo()
    counter = CountingEmbed(monkeypatch)
    resumed = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    assert counter.images == n_files - 2 * 16     # the two finished batches were not recomputed
    assert resumed.to_csv() == reference_csv


def _score_in_process(args):
    incoming, bank_path, cache = args
    import oddling as o

    return o.score(incoming, bank_path, options=o.RunOptions(cache_dir=cache, progress=False, batch_size=16)).to_csv()


def same_scores(csv_a: str, csv_b: str, tolerance: float = 2e-6) -> bool:
    """The same rows, text cells equal, numbers within `tolerance` (a few units of the CSV's sixth decimal)."""
    import csv
    import io

    rows_a, rows_b = list(csv.reader(io.StringIO(csv_a))), list(csv.reader(io.StringIO(csv_b)))
    if len(rows_a) != len(rows_b):
        return False
    for row_a, row_b in zip(rows_a, rows_b):
        for a, b in zip(row_a, row_b, strict=True):
            try:
                if abs(float(a) - float(b)) > tolerance:
                    return False
            except ValueError:
                if a != b:
                    return False
    return True


def test_two_processes_sharing_a_cache(digits_folders, digits_bank, tmp_path, reference_csv):
    # The two runs look up each other's vectors as they go, so each sends the network batches of
    # another composition than a lone run: the runtime's last bits may differ (never the rows).
    cache = tmp_path / "shared"
    job = (str(digits_folders["incoming"]), str(digits_bank.path), str(cache))
    with multiprocessing.get_context("spawn").Pool(2) as pool:
        outputs = pool.map(_score_in_process, [job, job])
    assert all(same_scores(out, reference_csv) for out in outputs)
    third = _score_in_process(job)     # and what they left behind is a valid cache
    assert same_scores(third, reference_csv)


def test_no_cache_leaves_no_files(digits_folders, digits_bank, tmp_path):
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(tmp_path / "c", use_cache=False))
    assert not (tmp_path / "c" / "embeddings").exists()


def _database(cache):
    [db] = (cache / "embeddings").rglob("features.sqlite")
    return db


def _sql(db, statement, args=()):
    """Change the database behind oddling's back, with Python's own sqlite3 module."""
    conn = sqlite3.connect(db, isolation_level=None)
    try:
        return conn.execute(statement, args).fetchall()
    finally:
        conn.close()


def _oddling_warnings(record):
    return [str(w.message) for w in record if issubclass(w.category, oddling.OddlingWarning)]


def test_a_row_tampered_in_the_database_is_skipped_warned_and_recomputed(digits_folders, digits_bank, tmp_path,
                                                                          monkeypatch, reference_csv):
    cache = tmp_path / "cache"
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    db = _database(cache)
    [(digest, vector)] = _sql(db, "SELECT sha256, vector FROM features ORDER BY sha256 LIMIT 1")
    flipped = vector[:100] + bytes([vector[100] ^ 0x40]) + vector[101:]     # one byte of one vector
    _sql(db, "UPDATE features SET vector = ? WHERE sha256 = ?", (flipped, digest))
    counter = CountingEmbed(monkeypatch)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        again = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    [message] = _oddling_warnings(record)                 # said once, not fatal
    assert "damaged entries" in message and "signature does not match" in message
    assert counter.images == 1                            # only that image was embedded again
    assert again.to_csv() == reference_csv
    assert _sql(db, "SELECT vector FROM features WHERE sha256 = ?", (digest,)) == [(vector,)]   # and put back


@pytest.mark.parametrize("damage", ["garbage", "truncated", "zero bytes then garbage header"])
def test_a_damaged_database_file_is_one_warning_and_a_fresh_store(digits_folders, digits_bank, tmp_path, monkeypatch,
                                                                  reference_csv, damage):
    cache = tmp_path / "cache"
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    db = _database(cache)
    _sql(db, "PRAGMA wal_checkpoint(TRUNCATE)")          # every row in the main file, then damage it
    for suffix in ("-wal", "-shm"):
        Path(f"{db}{suffix}").unlink(missing_ok=True)
    data = db.read_bytes()
    if damage == "garbage":
        db.write_bytes(np.random.default_rng(0).bytes(len(data)))
    elif damage == "truncated":
        db.write_bytes(data[:len(data) // 3])             # the header is whole, most rows are gone
    else:
        db.write_bytes(b"SQLite format 2\x00" + data[16:])
    counter = CountingEmbed(monkeypatch)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        again = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    [message] = _oddling_warnings(record)
    assert "damaged" in message and "fresh one" in message, message
    assert again.to_csv() == reference_csv
    assert counter.images > 0
    n_files = len(list(digits_folders["incoming"].iterdir()))
    assert _sql(db, "SELECT COUNT(*) FROM features") == [(n_files,)]      # a working store again
    monkeypatch.undo()
    counter = CountingEmbed(monkeypatch)
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    assert counter.images == 0


# --- bounded memory and several writers, on the store itself --------------------------------------

DIM = 1280   # efficientnet-lite0's features: 5 KB a row


def _unit_vectors(seed: int, n: int, dim: int = DIM) -> np.ndarray:
    x = np.random.default_rng(seed).standard_normal((n, dim)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def _health(n: int) -> np.ndarray:
    from oddling.data.health import STATS

    return np.arange(n * len(STATS), dtype=np.float64).reshape(n, len(STATS))


def _digest(i: int) -> str:
    return hashlib.sha256(str(i).encode()).hexdigest()


def _bytes_read() -> int | None:
    """Bytes this process has asked read(2) for, page cache or not (Linux: /proc/self/io "rchar")."""
    try:
        with open("/proc/self/io") as f:
            return next(int(line.split()[1]) for line in f if line.startswith("rchar:"))
    except OSError:
        return None


def test_a_lookup_reads_one_row_not_the_whole_cache(tmp_path):
    from oddling.embedding.cache import EmbeddingCache

    n, block = 20_000, 1000
    cache = EmbeddingCache.open(tmp_path / "c", {"id": "big"}, "stub", dim=DIM, unit_norm=True)
    for start in range(0, n, block):                      # 20,000 x 1280 floats = 98 MiB of vectors
        vectors, health = _unit_vectors(start, block), _health(block)
        for i in range(block):
            cache.add(_digest(start + i), vectors[i], health[i])
    cache.close()
    assert cache.path.stat().st_size > n * DIM * 4
    wanted = 12_345
    expected = _unit_vectors(wanted - wanted % block, block)[wanted % block]   # what was put in
    EmbeddingCache.open(tmp_path / "c", {"id": "big"}, "stub", dim=DIM).get(_digest(0))   # imports done

    before = _bytes_read()
    tracemalloc.start()
    try:
        looked_up = EmbeddingCache.open(tmp_path / "c", {"id": "big"}, "stub", dim=DIM, unit_norm=True)
        vector, health = looked_up.get(_digest(wanted))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    after = _bytes_read()
    np.testing.assert_array_equal(vector, expected)
    np.testing.assert_array_equal(health, _health(block)[wanted % block])
    assert peak < 5 * 2 ** 20, peak                      # the chunk cache allocated all 98 MiB here
    if before is not None:
        assert after - before < 5 * 2 ** 20, after - before


def _write_digests(cache_root: str, numbers: list[int], flush_every: int) -> None:
    """One writer process: the vector of each number, written in transactions of `flush_every`."""
    import oddling.embedding.cache as cache_module

    cache_module.FLUSH_EVERY = flush_every
    cache = cache_module.EmbeddingCache.open(cache_root, {"id": "shared"}, "stub", dim=64, unit_norm=True)
    for i in numbers:
        cache.add(_digest(i), _unit_vectors(i, 1, 64)[0], _health(1)[0] + i)
        cache.get(_digest(numbers[0]))                   # and reads, while the other one writes
    cache.close()


def test_two_processes_writing_different_and_overlapping_rows(tmp_path):
    from oddling.embedding.cache import EmbeddingCache

    first, second = list(range(0, 600)), list(range(300, 900))    # 300 content hashes in both
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(2) as pool:
        pool.starmap(_write_digests, [(str(tmp_path), first, 7), (str(tmp_path), second, 11)])
    with warnings.catch_warnings():
        warnings.simplefilter("error")                   # no damaged row, no failed write
        cache = EmbeddingCache.open(tmp_path, {"id": "shared"}, "stub", dim=64, unit_norm=True)
        found = cache.get_many([_digest(i) for i in range(900)])
    assert len(found) == 900 and len(cache) == 900
    for i in range(900):                                 # every row as it was put in
        np.testing.assert_array_equal(found[_digest(i)][0], _unit_vectors(i, 1, 64)[0])
        np.testing.assert_array_equal(found[_digest(i)][1], _health(1)[0] + i)


def _fill(cache_root, n=5):
    from oddling.embedding.cache import EmbeddingCache

    cache = EmbeddingCache.open(cache_root, {"id": "ro"}, "stub", dim=DIM, unit_norm=True)
    vectors = _unit_vectors(0, n)
    for i in range(n):
        cache.add(_digest(i), vectors[i], _health(n)[i])
    cache.close()
    return cache.folder, vectors


def _read_only_checks(cache_root, vectors, message):
    from oddling.embedding.cache import EmbeddingCache

    assert "cannot be written" in message and "features already in it are used" in message, message
    cache = EmbeddingCache.open(cache_root, {"id": "ro"}, "stub", dim=DIM, unit_norm=True)
    found = cache.get_many([_digest(i) for i in range(len(vectors))])
    np.testing.assert_array_equal(np.stack([found[_digest(i)][0] for i in range(len(vectors))]), vectors)
    assert not cache.writable
    cache.add(_digest(99), _unit_vectors(99, 1)[0], _health(1)[0])      # no error: not saved
    cache.flush()
    assert cache.get(_digest(99)) is None


def test_a_read_only_cache_is_still_read_and_the_run_goes_on(tmp_path, monkeypatch):
    """As a folder without write permission behaves for SQLite: opening to write fails with
    SQLITE_READONLY or SQLITE_CANTOPEN (the -wal file cannot be made); simulated here, since the
    tests may run as root, whom permissions do not stop. Reading goes through the real read-only
    open of the real file."""
    import oddling.embedding.cache as cache_module

    folder, vectors = _fill(tmp_path)
    real = cache_module._connect

    def connect(path, read_only=False):
        if not read_only:
            raise sqlite3.OperationalError("attempt to write a readonly database")
        return real(path, read_only)

    monkeypatch.setattr(cache_module, "_connect", connect)
    for suffix in ("-wal", "-shm"):            # a folder that cannot be written has none (nobody made them)
        assert not Path(f"{folder / 'features.sqlite'}{suffix}").exists()
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        cache_module.EmbeddingCache.open(tmp_path, {"id": "ro"}, "stub", dim=DIM)
    [message] = _oddling_warnings(record)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _read_only_checks(tmp_path, vectors, message)


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0, reason="permissions do not stop root")
def test_a_folder_without_write_permission_is_still_read(tmp_path):
    folder, vectors = _fill(tmp_path)
    folder.chmod(0o555)
    try:
        with warnings.catch_warnings(record=True) as record:
            warnings.simplefilter("always")
            from oddling.embedding.cache import EmbeddingCache

            EmbeddingCache.open(tmp_path, {"id": "ro"}, "stub", dim=DIM)
        [message] = _oddling_warnings(record)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _read_only_checks(tmp_path, vectors, message)
    finally:
        folder.chmod(0o755)


def test_cache_key_depends_on_runtime_and_weights():
    from oddling.embedding.cache import cache_key

    fp = {"id": "x", "weights_sha256": "a" * 64}
    assert cache_key(fp, "onnx") != cache_key(fp, "torch")
    assert cache_key(fp, "onnx") != cache_key(dict(fp, weights_sha256="b" * 64), "onnx")
    assert np.array_equal([cache_key(fp, "onnx")], [cache_key(dict(fp), "onnx")])


class StubRepresentation:
    """What open_cache reads of a representation."""

    def __init__(self, kind="embedding", dim=8, cacheable=True):
        self.spec = type("Spec", (), {"kind": kind})()
        self.embedding_dim, self.cacheable, self.runtime = dim, cacheable, "stub"

    def cache_fingerprint(self):
        return {"id": f"stub-{self.spec.kind}"}


@pytest.mark.parametrize("kind, unit_norm", [("embedding", True), ("stages", True), ("pixels", False)])
def test_open_cache_checks_the_dimension_and_the_unit_length_of_normalised_features(tmp_path, kind, unit_norm):
    from oddling.embedding.cache import open_cache

    cache = open_cache(StubRepresentation(kind, dim=8), opts(tmp_path))
    assert (cache.dim, cache.unit_norm) == (8, unit_norm)
    assert cache.folder.parent == tmp_path / "embeddings"


def test_open_cache_gives_none_when_caching_is_off_or_the_features_are_not_cached(tmp_path):
    from oddling.embedding.cache import open_cache

    assert open_cache(StubRepresentation(), opts(tmp_path, use_cache=False)) is None
    assert open_cache(StubRepresentation("patches", cacheable=False), opts(tmp_path)) is None
    assert not (tmp_path / "embeddings").exists()


def test_open_cache_on_a_folder_that_cannot_be_used_warns_once_and_the_run_goes_on(tmp_path):
    from oddling.embedding.cache import open_cache

    blocked = tmp_path / "file"
    blocked.write_text("a file where the cache folder should be")
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        cache = open_cache(StubRepresentation(), opts(blocked))
        assert cache is None or cache.get("0" * 64) is None
    [message] = _oddling_warnings(record)
    assert str(blocked) in message and "without it" in message
