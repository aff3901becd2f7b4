"""On-disk cache of embeddings, keyed by file content and everything that shapes the vector.

Layout: <cache>/embeddings/<key>/chunk-*.npz, where <key> digests the backbone id, weight
SHA-256, preprocessing, runtime (with its precision) and health definition; each chunk holds `sha256` (file content hashes),
`vectors`, `health` (the image statistics of health.STATS) and `mac`. Chunks are written to a
temporary name and renamed, so a reader never sees half a chunk and two processes sharing the
cache never write the same file. Work is flushed every FLUSH_EVERY new vectors and when a run
stops (Ctrl-C included), so an interrupted fit or score resumes where it stopped.

A chunk with the right content hashes and chosen vectors could hide any image, so each chunk is
bound to what produced it: `mac` is an HMAC-SHA256 (RFC 2104) under a secret key kept in the
cache folder (`cache.key`, 32 random bytes, mode 0600, owned by the user) over the cache key,
the content hashes, the vectors and the health rows. A chunk whose MAC does not verify is
skipped and its images are embedded again. A key file that is not a private regular file of the
current user (another owner, readable by others, a link, the wrong length) is replaced by a new
key, which invalidates every chunk made under the old one.

The cache is an optimisation: a chunk that cannot be read or verified is skipped, removed and
reported once (an OddlingWarning); a chunk that cannot be written (a full disk, a read-only
folder) is reported once and the run goes on without saving to the cache.
"""
from __future__ import annotations

import errno
import hashlib
import hmac
import json
import os
import secrets
import stat
import uuid
import warnings
from pathlib import Path

import numpy as np

from oddling.data.health import STATS

FLUSH_EVERY = 256        # new vectors per chunk file: bounds the work lost to a hard kill
COMPACT_ABOVE = 64       # merge chunk files when there are more than this many
KEY_FILE = "cache.key"   # the secret that signs this cache's chunks
KEY_BYTES = 32
UNIT_NORM_TOLERANCE = 1e-3


def _warn(message: str) -> None:
    from oddling.jobs.common import OddlingWarning   # lazily: jobs sit above embedding

    warnings.warn(message, OddlingWarning, stacklevel=3)


def cache_key(fingerprint: dict, runtime: str) -> str:
    """The folder name for one representation and runtime. The image-health definition is in it
    too (the chunks hold health statistics): entries of another health version are not reused."""
    from oddling.data.health import HEALTH_VERSION

    text = json.dumps({"backbone": fingerprint, "runtime": runtime, "health_version": HEALTH_VERSION},
                      sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:24]


def _unit_rows(vectors: np.ndarray) -> bool:
    """Every row of length 1 (within UNIT_NORM_TOLERANCE) or 0 (a flat image's zero-mean pixels)."""
    norms = np.linalg.norm(np.asarray(vectors, np.float64), axis=1)
    return bool(np.all((np.abs(norms - 1.0) <= UNIT_NORM_TOLERANCE) | (norms < 1e-6)))


class _Damaged(Exception):
    """A chunk file that cannot be used; the message says why."""


class _Untrusted(Exception):
    """A key file that must not be used; the message says why."""


class EmbeddingCache:
    """Features by file content hash, for one cache key.

    `dim` is the length every vector must have (None: the first chunk's); with `unit_norm`
    every vector must have length 1 (within 1e-3) or 0, as the L2-normalised representations
    give. Chunks that do not fit, or whose signature does not verify, are skipped like unreadable
    ones, and their images are embedded again.
    """

    def __init__(self, folder: Path, dim: int | None = None, unit_norm: bool = False):
        self.folder = Path(folder)
        self.dim = dim
        self.unit_norm = unit_norm
        self.vectors: dict[str, np.ndarray] = {}
        self.health: dict[str, np.ndarray] = {}
        self._pending_hashes: list[str] = []
        self._pending_vectors: list[np.ndarray] = []
        self._pending_health: list[np.ndarray] = []
        self._key: bytes | None = None
        self.writable = True     # False once a write failed: the run goes on without saving

    @classmethod
    def open(cls, cache_root: Path, fingerprint: dict, runtime: str, *, dim: int | None = None,
             unit_norm: bool = False) -> "EmbeddingCache":
        cache = cls(Path(cache_root) / "embeddings" / cache_key(fingerprint, runtime), dim, unit_norm)
        try:
            cache.folder.mkdir(parents=True, exist_ok=True)
            cache._key, renewed = cache._secret()
        except OSError as exc:
            cache.writable = False
            _warn(f"the embedding cache {cache.folder} cannot be used ({exc.strerror or exc}); this run goes on "
                  "without it")
            return cache
        cache._load(report=not renewed)
        return cache

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
            fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
        except FileNotFoundError:
            raise
        except OSError as exc:
            if path.is_symlink():
                raise _Untrusted("is a symbolic link") from exc
            raise
        with os.fdopen(fd, "rb") as f:
            info = os.fstat(f.fileno())
            key = f.read(KEY_BYTES + 1)
        if not stat.S_ISREG(info.st_mode):
            raise _Untrusted("is not a regular file")
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

    def _signature(self, hashes, vectors: np.ndarray, health: np.ndarray) -> str:
        """HMAC-SHA256 over the cache key, the content hashes, the vectors and the health rows."""
        if self._key is None:
            self._key, _ = self._secret()
        mac = hmac.new(self._key, digestmod=hashlib.sha256)
        parts = (self.folder.name.encode(), "\0".join(str(h) for h in hashes).encode("utf-8", "surrogatepass"),
                 repr(vectors.shape).encode(), np.ascontiguousarray(vectors, dtype="<f4").tobytes(),
                 repr(health.shape).encode(), np.ascontiguousarray(health, dtype="<f8").tobytes())
        for part in parts:          # length-prefixed, so no two different chunks read the same
            mac.update(len(part).to_bytes(8, "little"))
            mac.update(part)
        return mac.hexdigest()

    def _chunk_files(self) -> list[Path]:
        return sorted(self.folder.glob("chunk-*.npz"))

    def _load(self, report: bool = True) -> None:
        self._remove_stale_partials()
        files = self._chunk_files()
        damaged: list[tuple[Path, str]] = []
        for path in files:
            try:
                hashes, vectors, health = self._read_chunk(path)
            except FileNotFoundError:
                continue   # removed by a concurrent compaction: its vectors are in the merged chunk
            except _Damaged as exc:
                damaged.append((path, str(exc)))
                continue
            for digest, vec, stats in zip(hashes, vectors, health):
                self.vectors[str(digest)] = vec
                self.health[str(digest)] = stats
        if damaged:
            self._drop(damaged, report)
            files = [f for f in files if f not in {p for p, _ in damaged}]
        if len(files) > COMPACT_ABOVE:
            self._compact(files)

    def _remove_stale_partials(self) -> None:
        """Half-written chunks of processes that were killed (`.chunk-*.npz.partial-PID`)."""
        from oddling.bank.store import pid_alive

        for path in self.folder.glob(".chunk-*.npz.partial-*"):
            pid = path.name.rsplit("-", 1)[-1]
            if pid.isdigit() and not pid_alive(int(pid)):
                try:
                    path.unlink()
                except OSError:
                    pass

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
            expected = self._signature(hashes, vectors, health).encode()
        except UnicodeError as exc:
            raise _Damaged("content hashes are not text") from exc
        if not hmac.compare_digest(given, expected):
            raise _Damaged("signature does not match its content (edited, or made under another key)")
        if not np.isfinite(vectors).all():
            raise _Damaged("vectors hold NaN or infinite values")
        if self.unit_norm and not _unit_rows(vectors):
            raise _Damaged("vectors are not of unit length")
        if self.dim is None:
            self.dim = vectors.shape[1]
        return hashes, vectors, health

    def _drop(self, damaged: list[tuple[Path, str]], report: bool = True) -> None:
        """Report damaged chunks once, and remove them so the next run does not meet them again."""
        for path, _ in damaged:
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass
        if not report:
            return
        path, why = damaged[0]
        more = f" and {len(damaged) - 1} more" if len(damaged) > 1 else ""
        _warn(f"the embedding cache {self.folder} held damaged chunk files, skipped and removed "
              f"({path.name}: {why}{more}); their images are embedded again")

    def acceptable(self, vector: np.ndarray) -> bool:
        """Whether a vector may go into the cache: the right length, finite, of unit length where asked."""
        vector = np.asarray(vector)
        return (vector.ndim == 1 and (self.dim is None or len(vector) == self.dim)
                and bool(np.isfinite(vector).all()) and (not self.unit_norm or _unit_rows(vector[None])))

    def _write_chunk(self, hashes: list[str], vectors: np.ndarray, health: np.ndarray) -> Path | None:
        """Write one chunk; None (after one warning, and no more writes) when the disk refuses it."""
        if not self.writable:
            return None
        name = f"chunk-{uuid.uuid4().hex}.npz"
        tmp = self.folder / f".{name}.partial-{os.getpid()}"
        try:
            with open(tmp, "wb") as f:
                hashes = np.array(hashes, dtype="U64")
                vectors, health = np.asarray(vectors, np.float32), np.asarray(health, np.float64)
                np.savez(f, sha256=hashes, vectors=vectors, health=health,
                         mac=np.array(self._signature(hashes, vectors, health)))
            os.replace(tmp, self.folder / name)
        except OSError as exc:
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass
            self.writable = False
            why = "no space left on device" if exc.errno == errno.ENOSPC else (exc.strerror or str(exc))
            _warn(f"could not save to the embedding cache {self.folder} ({why}); this run goes on without "
                  "saving features to it")
            return None
        return self.folder / name

    def _compact(self, files: list[Path]) -> None:
        """Merge everything read into one chunk, then remove the files it replaces."""
        hashes = sorted(self.vectors)
        if hashes and self._write_chunk(hashes, np.stack([self.vectors[h] for h in hashes]),
                             np.stack([self.health[h] for h in hashes])) is None:
            return
        for path in files:
            path.unlink(missing_ok=True)

    def get(self, digest: str | None) -> tuple[np.ndarray, np.ndarray] | None:
        """(vector, health statistics) for a content hash, or None."""
        if not digest or digest not in self.vectors:
            return None
        return self.vectors[digest], self.health[digest]

    def add(self, digest: str, vector: np.ndarray, health: np.ndarray) -> None:
        self.vectors[digest] = vector
        self.health[digest] = health
        if not self.writable or not self.acceptable(vector):
            return
        if self.dim is None:
            self.dim = len(vector)
        self._pending_hashes.append(digest)
        self._pending_vectors.append(vector)
        self._pending_health.append(health)
        if len(self._pending_hashes) >= FLUSH_EVERY:
            self.flush()

    def flush(self) -> None:
        if self._pending_hashes:
            hashes, vectors, health = self._pending_hashes, self._pending_vectors, self._pending_health
            self._pending_hashes, self._pending_vectors, self._pending_health = [], [], []
            self._write_chunk(hashes, np.stack(vectors), np.stack(health))
