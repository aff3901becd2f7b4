"""On-disk cache of embeddings, keyed by file content and everything that shapes the vector.

Layout: <cache>/embeddings/<key>/features.sqlite, where <key> digests the backbone id, weight
SHA-256, preprocessing, runtime (with its precision) and health definition. One SQLite database
per key, looked up row by row: opening it reads nothing but the schema, so memory does not grow
with the number of cached images.

Schema (version 1):

- `meta(key TEXT PRIMARY KEY, value TEXT)`: `schema_version` ("1"), `created` (UTC ISO time).
- `features(sha256 TEXT PRIMARY KEY, vector BLOB, health BLOB, mac BLOB)`: one row per file
  content hash; `vector` is the embedding as little-endian float32, `health` the image
  statistics of health.STATS as little-endian float64, `mac` the row's signature (32 bytes).

WAL journal mode and a busy timeout (as the scored-image log, logbook/store.py): readers never
block the writer, and several processes (two fits, the service, Dask workers on a shared disk)
read and write one database at once through SQLite's own locking. New vectors are written in one
transaction every FLUSH_EVERY and when a run stops (Ctrl-C included), so an interrupted fit or
score resumes where it stopped and a killed writer never leaves half a row.

A row with a chosen vector under a file's content hash could hide any image, so each row is
bound to what produced it: `mac` is an HMAC-SHA256 (RFC 2104) under a secret key kept in the
cache folder (`cache.key`, 32 random bytes, mode 0600, owned by the user) over the cache key,
the content hash, the vector bytes and the health bytes, each length-prefixed. A row whose MAC
does not verify, of the wrong length, with non-finite values or (where `unit_norm` is asked) not
of unit length is treated as missing: it is deleted, reported once per run (an OddlingWarning),
and its image is embedded again. A key file that is not a private regular file of the current
user (another owner, readable by others, a link, the wrong length) is replaced by a new key, and
the rows signed under the old one are dropped.

The cache is an optimisation: a database file that is damaged (not a regular file, not SQLite,
truncated) is removed with one warning and a fresh one made; a cache that cannot be written (a full
disk, a read-only folder) is still read where SQLite can read it, writing stops after one warning,
and the run goes on.

Chunk files of earlier releases (`chunk-*.npz`, one HMAC per chunk under the same key) are
imported once: each is verified as before, its rows are added to the database, and the file is
removed; a chunk that does not verify is removed with one warning and its images are embedded
again. A read-only cache leaves them where they are and does not use them.
"""
from __future__ import annotations

import datetime as _dt
import errno
import hashlib
import hmac
import json
import os
import secrets
import sqlite3
import stat
import threading
import uuid
import warnings
from pathlib import Path

import numpy as np

from oddling.data.health import STATS
from oddling.errors import OddlingWarning
from oddling.files import remove_stale_partials

FLUSH_EVERY = 256        # new vectors per transaction: bounds the work lost to a hard kill
KEY_FILE = "cache.key"   # the secret that signs this cache's rows
KEY_BYTES = 32
DB_FILE = "features.sqlite"
SCHEMA_VERSION = 1
BUSY_TIMEOUT_MS = 30_000
UNIT_NORM_TOLERANCE = 1e-3
_LOOKUP_BATCH = 500      # content hashes per SELECT ... IN (...): under SQLite's parameter limit
_HEALTH_BYTES = 8 * len(STATS)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS features (
    sha256 TEXT PRIMARY KEY,
    vector BLOB NOT NULL,
    health BLOB NOT NULL,
    mac BLOB NOT NULL
);
"""


def _warn(message: str) -> None:
    warnings.warn(message, OddlingWarning, stacklevel=3)


def cache_key(fingerprint: dict, runtime: str) -> str:
    """The folder name for one representation and runtime. The image-health definition is in it
    too (the rows hold health statistics): entries of another health version are not reused."""
    from oddling.data.health import HEALTH_VERSION

    text = json.dumps({"backbone": fingerprint, "runtime": runtime, "health_version": HEALTH_VERSION},
                      sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:24]


def _unit_rows(vectors: np.ndarray) -> bool:
    """Every row of length 1 (within UNIT_NORM_TOLERANCE) or 0 (a flat image's zero-mean pixels)."""
    norms = np.linalg.norm(np.asarray(vectors, np.float64), axis=1)
    return bool(np.all((np.abs(norms - 1.0) <= UNIT_NORM_TOLERANCE) | (norms < 1e-6)))


def _damage(exc: sqlite3.Error) -> bool:
    """Whether an SQLite error means the database file itself is damaged (not a database, corrupt)."""
    code = getattr(exc, "sqlite_errorcode", None)
    if code is not None:
        return code & 0xFF in (sqlite3.SQLITE_CORRUPT, sqlite3.SQLITE_NOTADB)
    return type(exc) is sqlite3.DatabaseError


def _why(exc: BaseException) -> str:
    if isinstance(exc, OSError):
        return "no space left on device" if exc.errno == errno.ENOSPC else (exc.strerror or str(exc))
    if getattr(exc, "sqlite_errorcode", None) == sqlite3.SQLITE_FULL:
        return "no space left on device"
    return str(exc)


def _connect(path: Path, read_only: bool = False) -> sqlite3.Connection:
    """A connection in autocommit mode (transactions are explicit), shared by threads behind a lock."""
    if read_only:
        # immutable: a read-only folder cannot hold the -shm file WAL readers need; nobody can write there
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro&immutable=1", uri=True, isolation_level=None,
                               check_same_thread=False)
    else:
        conn = sqlite3.connect(path, timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None, check_same_thread=False)
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    return conn


class _Damaged(Exception):
    """A row or chunk file that cannot be used; the message says why."""


class _Untrusted(Exception):
    """A key file that must not be used; the message says why."""


class _DamagedFile(Exception):
    """The database file is not a usable SQLite database."""


def open_cache(representation, options) -> "EmbeddingCache | None":
    """The embedding cache a run with `options` (RunOptions) uses for `representation`, or None when
    caching is off or the representation is not cached (patch grids). Every row read back must have
    the representation's dimension, and unit length where its features are normalised. A cache
    folder that cannot be used is said once, in one OddlingWarning (by the cache itself, or here when
    it cannot even be opened: then None), and the run goes on without it."""
    from oddling.paths import cache_dir

    if not (options.use_cache and representation.cacheable):
        return None
    folder = cache_dir(options.cache_dir)
    try:
        return EmbeddingCache.open(folder, representation.cache_fingerprint(), representation.runtime,
                                   dim=representation.embedding_dim,
                                   # network features are unit length; a pixel thumbnail of a flat image is 0
                                   unit_norm=representation.spec.kind in ("embedding", "stages"))
        # (a folder it cannot write is still read; the cache says so once itself)
    except OSError as exc:
        warnings.warn(f"the embedding cache in {folder} is not usable ({exc.strerror or exc}): running "
                      "without it (nothing is reused or saved); pass --cache-dir with a writable folder, "
                      "or --no-cache to say so", OddlingWarning, stacklevel=3)
        return None


class EmbeddingCache:
    """Features by file content hash, for one cache key.

    `dim` is the length every vector must have (None: the first verified row's); with
    `unit_norm` every vector must have length 1 (within 1e-3) or 0, as the L2-normalised
    representations give. Rows that do not fit, or whose signature does not verify, are treated
    as missing like unreadable ones, and their images are embedded again. Thread-safe (one
    connection behind a lock); several processes may share the folder.
    """

    def __init__(self, folder: Path, dim: int | None = None, unit_norm: bool = False):
        self.folder = Path(folder)
        self.dim = dim
        self.unit_norm = unit_norm
        self._pending: dict[str, tuple[np.ndarray, np.ndarray]] = {}   # added, not yet written
        self._key: bytes | None = None
        self._conn: sqlite3.Connection | None = None
        self._lock = threading.RLock()
        self._reported = False   # damaged rows: one warning per run
        self.writable = True     # False once a write failed: the run goes on without saving

    @property
    def path(self) -> Path:
        return self.folder / DB_FILE

    @classmethod
    def open(cls, cache_root: Path, fingerprint: dict, runtime: str, *, dim: int | None = None,
             unit_norm: bool = False) -> "EmbeddingCache":
        cache = cls(Path(cache_root) / "embeddings" / cache_key(fingerprint, runtime), dim, unit_norm)
        cache._start()
        return cache

    def _start(self) -> None:
        """Make or read the key, open (or make) the database, import earlier chunk files."""
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            self._key, renewed = self._secret()
        except OSError as exc:
            self.writable = False
            _warn(f"the embedding cache {self.folder} cannot be used ({exc.strerror or exc}); this run goes on "
                  "without it")
            return
        self._open_database()
        if self._conn is None:
            return
        if renewed:   # every row was signed under the old key: none can verify now
            self._write(lambda conn: conn.execute("DELETE FROM features"))
        self._import_chunks(report=not renewed)

    # -- the key -------------------------------------------------------------------------------

    def _secret(self) -> tuple[bytes, bool]:
        """(the key, whether it was just replaced): read it, or make it on first use."""
        path = self.folder / KEY_FILE
        try:
            key = self._read_key(path)
            return key, False
        except FileNotFoundError:
            self._make_key(path, replace=False)
        except _Untrusted as exc:
            self._make_key(path, replace=True)
            _warn(f"the embedding cache key {path} {exc}; a new key was made, so the features cached under the old "
                  "one are computed again")
            return self._read_key(path), True
        return self._read_key(path), False

    @staticmethod
    def _read_key(path: Path) -> bytes:
        try:
            # O_NONBLOCK: a FIFO put in its place must not wait for a writer forever
            fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0))
        except FileNotFoundError:
            raise
        except OSError as exc:
            if path.is_symlink():
                raise _Untrusted("is a symbolic link") from exc
            raise
        with os.fdopen(fd, "rb") as f:
            info = os.fstat(f.fileno())
            if not stat.S_ISREG(info.st_mode):
                raise _Untrusted("is not a regular file")
            key = f.read(KEY_BYTES + 1)
        if hasattr(os, "geteuid"):   # POSIX: private to the user who runs oddling
            if info.st_uid != os.geteuid():
                raise _Untrusted(f"belongs to another user (uid {info.st_uid})")
            if info.st_mode & 0o077:
                raise _Untrusted(f"can be read or written by others (mode {stat.S_IMODE(info.st_mode):04o})")
        if len(key) != KEY_BYTES:
            raise _Untrusted(f"holds {len(key)} bytes, not {KEY_BYTES}")
        return key

    def _make_key(self, path: Path, replace: bool) -> None:
        """A new random key, in place at once (link or rename): a reader never sees half a key."""
        tmp = self.folder / f".{KEY_FILE}.{uuid.uuid4().hex}.partial"
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        try:
            try:
                os.write(fd, secrets.token_bytes(KEY_BYTES))
                os.fsync(fd)
            finally:
                os.close(fd)
            if replace:
                os.replace(tmp, path)
                return
            try:
                os.link(tmp, path)     # fails if another process made the key first: theirs is used
            except FileExistsError:
                pass
            except OSError:            # a file system without hard links
                if not path.exists():
                    os.replace(tmp, path)
        finally:
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass

    def _mac(self, digest: str, vector: bytes, health: bytes) -> bytes:
        """HMAC-SHA256 over the cache key, the content hash, the vector bytes and the health bytes."""
        mac = hmac.new(self._key, digestmod=hashlib.sha256)
        for part in (self.folder.name.encode(), digest.encode("utf-8", "surrogatepass"), vector, health):
            mac.update(len(part).to_bytes(8, "little"))   # length-prefixed: no two rows read the same
            mac.update(part)
        return mac.digest()

    # -- the database --------------------------------------------------------------------------

    def _open_database(self) -> None:
        """Open the database, making it on first use; a damaged file is replaced by a fresh one (one
        warning); a folder that cannot be written is opened to read only (one warning)."""
        try:
            self._conn = self._connect_and_check(read_only=False)
            return
        except _DamagedFile as exc:
            self._replace_damaged(str(exc))
            return
        except (OSError, sqlite3.Error) as exc:
            why = _why(exc)
        self.writable = False
        if self.path.exists():
            try:
                self._conn = self._connect_and_check(read_only=True)
            except (_DamagedFile, OSError, sqlite3.Error):
                self._conn = None
        reads = "features already in it are used, new ones are not saved" if self._conn is not None \
            else "nothing is reused or saved"
        _warn(f"the embedding cache {self.folder} cannot be written ({why}); {reads}, and this run goes on")

    def _connect_and_check(self, read_only: bool) -> sqlite3.Connection:
        try:
            mode = self.path.stat().st_mode
        except OSError:
            mode = None   # none yet (SQLite makes it), or not reachable (SQLite says why)
        if mode is not None and not stat.S_ISREG(mode):
            raise _DamagedFile("not a regular file")   # opening a FIFO would wait for a writer forever
        if mode is not None and not _is_sqlite(self.path):
            raise _DamagedFile("not an SQLite database")
        conn = _connect(self.path, read_only)
        try:
            if not read_only:
                mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    raise sqlite3.OperationalError(f"the file system does not allow SQLite's WAL mode ({mode})")
                conn.execute("PRAGMA synchronous = NORMAL")   # WAL + NORMAL: a crash loses no committed row
                conn.execute("BEGIN IMMEDIATE")
                try:
                    for statement in _SCHEMA.split(";\n"):
                        if statement.strip():
                            conn.execute(statement)
                    if conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone() is None:
                        conn.execute("INSERT INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
                        conn.execute("INSERT INTO meta VALUES ('created', ?)",
                                     (_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),))
                    conn.execute("COMMIT")
                except BaseException:
                    if conn.in_transaction:   # SQLite rolls back by itself on some errors (a full disk)
                        conn.execute("ROLLBACK")
                    raise
            version = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
            columns = [r[1] for r in conn.execute("PRAGMA table_info(features)")]
        except sqlite3.Error as exc:
            conn.close()
            if _damage(exc):
                raise _DamagedFile(str(exc)) from exc
            raise
        except BaseException:
            conn.close()
            raise
        if version is None or columns != ["sha256", "vector", "health", "mac"]:
            conn.close()
            raise _DamagedFile("not an oddling embedding cache")
        if not str(version[0]).isdigit() or int(version[0]) > SCHEMA_VERSION:
            conn.close()
            raise sqlite3.OperationalError(f"schema version {version[0]} is newer than this oddling's "
                                           f"{SCHEMA_VERSION}")
        return conn

    def _replace_damaged(self, why: str) -> None:
        """Remove a damaged database file and make a fresh one: the cache is only a shortcut."""
        self._disconnect()
        try:
            for suffix in ("", "-wal", "-shm"):
                Path(f"{self.path}{suffix}").unlink(missing_ok=True)
            self._conn = self._connect_and_check(read_only=False)
        except (_DamagedFile, OSError, sqlite3.Error) as exc:
            self.writable = False
            _warn(f"the embedding cache {self.path} was damaged ({why}) and could not be replaced ({_why(exc)}); "
                  "this run goes on without it")
            return
        _warn(f"the embedding cache {self.path} was damaged ({why}); it was removed and a fresh one made, so the "
              "features cached in it are computed again")

    def _write(self, work) -> bool:
        """Run `work(conn)` in one write transaction; False (after one warning, and no more writes)
        when the disk refuses it."""
        with self._lock:
            if not self.writable or self._conn is None:
                return False
            try:
                self._conn.execute("BEGIN IMMEDIATE")
                try:
                    work(self._conn)
                    self._conn.execute("COMMIT")
                except BaseException:
                    if self._conn.in_transaction:   # SQLite rolls back by itself on some errors (a full disk)
                        self._conn.execute("ROLLBACK")
                    raise
                return True
            except sqlite3.Error as exc:
                if _damage(exc):
                    self._replace_damaged(str(exc))
                    return False
                self.writable = False
                _warn(f"could not save to the embedding cache {self.folder} ({_why(exc)}); this run goes on "
                      "without saving features to it")
                return False

    def _query(self, sql: str, args) -> list[tuple]:
        """Rows of one SELECT; [] when the database cannot be read now (the cache is only a shortcut)."""
        with self._lock:
            if self._conn is None:
                return []
            try:
                return self._conn.execute(sql, args).fetchall()
            except sqlite3.Error as exc:
                if _damage(exc):
                    self._replace_damaged(str(exc))
                return []

    # -- rows ----------------------------------------------------------------------------------

    def _verify(self, digest: str, vector: bytes, health: bytes, mac: bytes) -> tuple[np.ndarray, np.ndarray]:
        """(vector, health) of one stored row, or _Damaged saying why it cannot be used."""
        if not isinstance(vector, bytes) or not isinstance(health, bytes) or not isinstance(mac, bytes):
            raise _Damaged("columns are not binary")
        if len(vector) % 4 or not vector or (self.dim is not None and len(vector) != 4 * self.dim):
            raise _Damaged(f"vector of {len(vector)} bytes, expected {4 * self.dim if self.dim else 'd x 4'}")
        if len(health) != _HEALTH_BYTES:
            raise _Damaged(f"health row of {len(health)} bytes, expected {_HEALTH_BYTES}")
        if not hmac.compare_digest(mac, self._mac(digest, vector, health)):
            raise _Damaged("signature does not match its content (edited, or made under another key)")
        vec = np.frombuffer(vector, "<f4").astype(np.float32)
        stats = np.frombuffer(health, "<f8").astype(np.float64)
        if not np.isfinite(vec).all():
            raise _Damaged("vector holds NaN or infinite values")
        if self.unit_norm and not _unit_rows(vec[None]):
            raise _Damaged("vector is not of unit length")
        if self.dim is None:
            self.dim = len(vec)
        return vec, stats

    def _found(self, rows: list[tuple]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Verified rows by content hash; the others are deleted and reported (once per run)."""
        found, damaged = {}, []
        for digest, vector, health, mac in rows:
            try:
                found[digest] = self._verify(digest, vector, health, mac)
            except _Damaged as exc:
                damaged.append((digest, vector, health, mac, str(exc)))
        if damaged:
            # Only the row as read: another process may have written a good one since.
            self._write(lambda conn: conn.executemany(
                "DELETE FROM features WHERE sha256 = ? AND vector IS ? AND health IS ? AND mac IS ?",
                [row[:4] for row in damaged]))
            if not self._reported:
                self._reported = True
                digest, *_, why = damaged[0]
                _warn(f"the embedding cache {self.path} held damaged entries, skipped and removed "
                      f"({str(digest)[:16]}: {why}); their images are embedded again")
        return found

    def get(self, digest: str | None) -> tuple[np.ndarray, np.ndarray] | None:
        """(vector, health statistics) for a content hash, or None: one row is read."""
        if not digest:
            return None
        with self._lock:
            if digest in self._pending:
                return self._pending[digest]
        rows = self._query("SELECT sha256, vector, health, mac FROM features WHERE sha256 = ?", (digest,))
        return self._found(rows).get(digest)

    def get_many(self, digests) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """{content hash: (vector, health statistics)} for those of `digests` that are cached; one
        query per 500 hashes."""
        wanted = list(dict.fromkeys(d for d in digests if d))
        with self._lock:
            found = {d: self._pending[d] for d in wanted if d in self._pending}
        rest = [d for d in wanted if d not in found]
        for start in range(0, len(rest), _LOOKUP_BATCH):
            part = rest[start:start + _LOOKUP_BATCH]
            found.update(self._found(self._query(
                f"SELECT sha256, vector, health, mac FROM features WHERE sha256 IN ({', '.join('?' * len(part))})",
                part)))
        return found

    def __len__(self) -> int:
        """Rows in the database (not verified) plus those added and not yet written."""
        rows = self._query("SELECT COUNT(*) FROM features", ())
        return (int(rows[0][0]) if rows else 0) + len(self._pending)

    def acceptable(self, vector: np.ndarray) -> bool:
        """Whether a vector may go into the cache: the right length, finite, of unit length where asked."""
        vector = np.asarray(vector)
        return (vector.ndim == 1 and (self.dim is None or len(vector) == self.dim)
                and bool(np.isfinite(vector).all()) and (not self.unit_norm or _unit_rows(vector[None])))

    def add(self, digest: str, vector: np.ndarray, health: np.ndarray) -> None:
        """Queue a new vector; written with the next FLUSH_EVERY (or at flush). Vectors that are not
        acceptable are not saved."""
        if not digest or not self.writable or not self.acceptable(vector):
            return
        if self.dim is None:
            self.dim = len(vector)
        with self._lock:
            self._pending[digest] = (np.asarray(vector, np.float32), np.asarray(health, np.float64))
            full = len(self._pending) >= FLUSH_EVERY
        if full:
            self.flush()

    def flush(self) -> None:
        """Write what was added, in one transaction (all or none)."""
        with self._lock:
            pending, self._pending = self._pending, {}
        if not pending:
            return
        values = []
        for digest, (vector, health) in pending.items():
            vec = np.ascontiguousarray(vector, dtype="<f4").tobytes()
            stats = np.ascontiguousarray(health, dtype="<f8").tobytes()
            values.append((digest, vec, stats, self._mac(digest, vec, stats)))
        # REPLACE: a row another process wrote for the same content is the same vector, freshly computed
        self._write(lambda conn: conn.executemany(
            "INSERT OR REPLACE INTO features (sha256, vector, health, mac) VALUES (?, ?, ?, ?)", values))

    def close(self) -> None:
        self.flush()
        with self._lock:
            self._disconnect()

    def _disconnect(self) -> None:
        """Close the connection, if any; an error closing it changes nothing for the run."""
        if self._conn is not None:
            try:
                self._conn.close()
            except sqlite3.Error:
                pass
            self._conn = None

    # -- chunk files of earlier releases ---------------------------------------------------------

    def _import_chunks(self, report: bool = True) -> None:
        """Move the rows of earlier releases' chunk files into the database, once (see the module doc)."""
        if not self.writable:
            return
        # half-written chunks of earlier releases' processes that were killed (`.chunk-*.npz.partial-PID`)
        remove_stale_partials(self.folder, ".chunk-*.npz.partial-*")
        damaged: list[tuple[Path, str]] = []
        for path in sorted(self.folder.glob("chunk-*.npz")):
            try:
                hashes, vectors, health = self._read_chunk(path)
            except FileNotFoundError:
                continue   # imported by a concurrent process
            except _Damaged as exc:
                damaged.append((path, str(exc)))
                continue
            for digest, vec, stats in zip(hashes, vectors, health):
                self._pending[str(digest)] = (vec, stats)
            self.flush()
            if not self.writable:
                return     # the chunk stays for a later run that can write
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass
        if damaged:
            self._drop(damaged, report)

    def _chunk_signature(self, hashes, vectors: np.ndarray, health: np.ndarray) -> str:
        """The earlier releases' HMAC-SHA256 of a whole chunk: cache key, content hashes, vectors, health rows."""
        mac = hmac.new(self._key, digestmod=hashlib.sha256)
        parts = (self.folder.name.encode(), "\0".join(str(h) for h in hashes).encode("utf-8", "surrogatepass"),
                 repr(vectors.shape).encode(), np.ascontiguousarray(vectors, dtype="<f4").tobytes(),
                 repr(health.shape).encode(), np.ascontiguousarray(health, dtype="<f8").tobytes())
        for part in parts:
            mac.update(len(part).to_bytes(8, "little"))
            mac.update(part)
        return mac.hexdigest()

    def _read_chunk(self, path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(content hashes, vectors, health rows) of one chunk file, or _Damaged saying why not."""
        try:
            data = np.load(path, allow_pickle=False)
        except FileNotFoundError:
            raise
        except Exception as exc:   # any damage (empty, garbage, truncated, pickled): the cache is only a shortcut
            raise _Damaged(f"unreadable ({type(exc).__name__})") from exc
        if not isinstance(data, np.lib.npyio.NpzFile):
            raise _Damaged("not a chunk archive")
        with data:
            try:
                hashes, vectors, health = data["sha256"], data["vectors"], data["health"]
                mac = data["mac"] if "mac" in data.files else None
            except Exception as exc:
                raise _Damaged(f"unreadable arrays ({type(exc).__name__})") from exc
        n = len(hashes) if hashes.ndim == 1 else -1
        if n < 0 or hashes.dtype.kind != "U":
            raise _Damaged("content hashes are not a list of strings")
        if vectors.dtype != np.float32 or vectors.ndim != 2 or len(vectors) != n:
            raise _Damaged(f"vectors have shape {vectors.shape} ({vectors.dtype}), expected ({n}, d) float32")
        if self.dim is not None and vectors.shape[1] != self.dim:
            raise _Damaged(f"vectors have length {vectors.shape[1]}, expected {self.dim}")
        if health.dtype != np.float64 or health.shape != (n, len(STATS)):
            raise _Damaged(f"health rows have shape {health.shape}, expected ({n}, {len(STATS)})")
        if mac is None or mac.shape != () or mac.dtype.kind != "U":
            raise _Damaged("not signed (made by an earlier oddling, or edited)")
        try:
            given = str(mac[()]).encode("utf-8", "surrogatepass")
            expected = self._chunk_signature(hashes, vectors, health).encode()
        except UnicodeError as exc:
            raise _Damaged("content hashes are not text") from exc
        if not hmac.compare_digest(given, expected):
            raise _Damaged("signature does not match its content (edited, or made under another key)")
        if not np.isfinite(vectors).all():
            raise _Damaged("vectors hold NaN or infinite values")
        if self.unit_norm and not _unit_rows(vectors):
            raise _Damaged("vectors are not of unit length")
        if self.dim is None and n:
            self.dim = vectors.shape[1]
        return hashes, vectors, health

    def _drop(self, damaged: list[tuple[Path, str]], report: bool = True) -> None:
        """Report damaged chunk files once, and remove them so the next run does not meet them again."""
        for path, _ in damaged:
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass
        if not report:
            return
        path, why = damaged[0]
        more = f" and {len(damaged) - 1} more" if len(damaged) > 1 else ""
        _warn(f"the embedding cache {self.folder} held damaged chunk files of an earlier release, skipped and "
              f"removed ({path.name}: {why}{more}); their images are embedded again")


def _is_sqlite(path: Path) -> bool:
    """An SQLite file by its header (an empty file is an empty database to SQLite)."""
    try:
        with open(path, "rb") as f:
            head = f.read(16)
    except OSError:
        return True    # unreadable: let SQLite say what is wrong
    return head == b"SQLite format 3\x00" or head == b""
