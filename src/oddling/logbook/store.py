"""The scored-image log: one SQLite database, append-only, written by `score --log`, the service and the watcher.

Schema (version 1; README "Continuous use" documents it for users):

- `meta(key TEXT PRIMARY KEY, value TEXT)`: `schema_version` ("1"), `created` (UTC ISO time),
  `bank` (the bank folder the log was opened for first, as text; informative only).
- `scored`: one row per scored (or refused) file, never updated or deleted (triggers refuse it):
  `id` (INTEGER PRIMARY KEY AUTOINCREMENT: insertion order, also across processes), `time` (UTC,
  ISO 8601 with microseconds and "+00:00"), `source` ("score", "service", "watch"), `name` (what
  the file was called: path relative to the scored folder, or the client's file name), `path`
  (absolute path of the file that was read; NULL for uploads), `sha256` (content hash; NULL when
  the file was refused before being read), `score`, `p_value`, `flagged` (1/0; all three NULL
  when not scored), `nearest` (closest reference, relative to the bank's reference folder),
  `nearest_distance`, `neighbours` (JSON list of [reference, distance] for the k nearest),
  `health`, `status` ("ok" or why not scored), `bank` (bank fingerprint: the first 16 hex digits of
  the SHA-256 of its bank.json), `request` (the run, request or batch that wrote the row).
- Indexes on `time` and `sha256` (and `bank`).

Paths are stored as `intake.display_path` writes them (valid UTF-8 whatever the file system gave).
WAL journal mode: readers never block the writer and a killed writer never leaves a half row;
several processes may write (SQLite's own locking, with a busy timeout).
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import re
import sqlite3
import threading
from dataclasses import asdict, dataclass, fields
from pathlib import Path

from oddling.errors import OddlingError

SCHEMA_VERSION = 1
LOG_SUFFIX = ".log.sqlite"
SOURCES = ("score", "service", "watch")
BUSY_TIMEOUT_MS = 30_000

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS scored (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    time TEXT NOT NULL,
    source TEXT NOT NULL,
    name TEXT NOT NULL,
    path TEXT,
    sha256 TEXT,
    score REAL,
    p_value REAL,
    flagged INTEGER,
    nearest TEXT,
    nearest_distance REAL,
    neighbours TEXT,
    health TEXT,
    status TEXT NOT NULL,
    bank TEXT NOT NULL,
    request TEXT
);
CREATE INDEX IF NOT EXISTS scored_time ON scored (time);
CREATE INDEX IF NOT EXISTS scored_sha256 ON scored (sha256);
CREATE INDEX IF NOT EXISTS scored_bank ON scored (bank);
CREATE TRIGGER IF NOT EXISTS scored_no_update BEFORE UPDATE ON scored
    BEGIN SELECT RAISE(ABORT, 'the scored-image log is append-only'); END;
CREATE TRIGGER IF NOT EXISTS scored_no_delete BEFORE DELETE ON scored
    BEGIN SELECT RAISE(ABORT, 'the scored-image log is append-only'); END;
"""


@dataclass
class LogRow:
    """One row of the `scored` table (id and time are filled in by `ScoreLog.append` when missing)."""

    source: str
    name: str
    status: str
    bank: str
    path: str | None = None
    sha256: str | None = None
    score: float | None = None
    p_value: float | None = None
    flagged: bool | None = None
    nearest: str | None = None
    nearest_distance: float | None = None
    neighbours: list | None = None
    health: str | None = None
    request: str | None = None
    time: str | None = None
    id: int | None = None

    def to_dict(self) -> dict:
        return asdict(self)


COLUMNS = [f.name for f in fields(LogRow) if f.name != "id"]
EXPORT_COLUMNS = ["id", "time", "source", "name", "path", "sha256", "score", "p_value", "flagged", "nearest",
                  "nearest_distance", "health", "status", "bank", "request"]


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")


_RELATIVE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|m|h|d|w)\s*$", re.IGNORECASE)
_UNIT_SECONDS = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 604800}


def parse_time(text: str, now: _dt.datetime | None = None) -> str:
    """A --since / --until value as the log's UTC ISO text: an ISO 8601 date or time (no zone = UTC),
    or an age such as 30m, 24h, 7d (before now)."""
    if not isinstance(text, str) or not text.strip():
        raise OddlingError("a time must be an ISO 8601 date or time (2024-05-01, 2024-05-01T08:00) or an age "
                           "such as 30m, 24h, 7d")
    match = _RELATIVE.match(text)
    if match:
        now = now or _dt.datetime.now(_dt.timezone.utc)
        moment = now - _dt.timedelta(seconds=float(match.group(1)) * _UNIT_SECONDS[match.group(2).lower()])
    else:
        try:
            moment = _dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00").replace("z", "+00:00"))
        except ValueError:
            raise OddlingError(f"{text!r} is not a time: give an ISO 8601 date or time (2024-05-01, "
                               "2024-05-01T08:00:00+02:00; no zone means UTC) or an age such as 30m, 24h, 7d") from None
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=_dt.timezone.utc)
    return moment.astimezone(_dt.timezone.utc).isoformat(timespec="microseconds")


def default_log_path(bank_path: str | os.PathLike) -> Path:
    """`<bank>.log.sqlite` beside the bank folder: one log per bank."""
    bank_path = Path(bank_path)
    return bank_path.with_name(bank_path.name + LOG_SUFFIX)


def bank_fingerprint(bank) -> str:
    """What identifies the bank a row was scored against: SHA-256 of its bank.json (16 hex digits).
    A bank replaced by `bank add/remove` or a refit gets a new fingerprint."""
    if getattr(bank, "path", None) is not None and (Path(bank.path) / "bank.json").is_file():
        data = (Path(bank.path) / "bank.json").read_bytes()
    else:
        data = json.dumps(bank.metadata(), sort_keys=True).encode("utf-8")
    return hashlib.sha256(data).hexdigest()[:16]


def _is_sqlite(path: Path) -> bool:
    try:
        with open(path, "rb") as f:
            head = f.read(16)
    except OSError:
        return False
    return head == b"SQLite format 3\x00" or head == b""


class ScoreLog:
    """The scored-image log. Thread-safe (one connection behind a lock); several processes may share the file.

    >>> log = ScoreLog("parts.bank.log.sqlite")                 # doctest: +SKIP
    >>> log.append([LogRow(source="score", name="a.png", status="ok", bank="...")])   # doctest: +SKIP
    """

    def __init__(self, path: str | os.PathLike, *, create: bool = True, bank_path: str | os.PathLike | None = None):
        self.path = Path(path)
        if self.path.is_dir():
            raise OddlingError(f"log {self.path} is a folder; give the path of a .sqlite file")
        if not self.path.exists():
            if not create:
                raise OddlingError(f"log {self.path} does not exist (it is written by `score --log`, `serve` "
                                   "and `watch`)")
            if not self.path.parent.is_dir():
                raise OddlingError(f"folder {self.path.parent} for the log does not exist")
        elif not _is_sqlite(self.path):
            raise OddlingError(f"{self.path} is not an oddling log (not an SQLite database)")
        self._lock = threading.Lock()
        try:
            self._conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None,
                                         check_same_thread=False)
            self._conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            mode = self._conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise OddlingError(f"log {self.path}: the file system does not allow SQLite's WAL mode ({mode})")
            self._conn.execute("PRAGMA synchronous = NORMAL")   # WAL + NORMAL: a crash loses no committed row
            self._conn.execute("PRAGMA foreign_keys = ON")
            self._init_schema(bank_path)
        except sqlite3.DatabaseError as exc:
            raise OddlingError(f"{self.path} is not a usable oddling log: {exc}") from exc

    def _init_schema(self, bank_path) -> None:
        with self._transaction() as conn:
            tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            if tables and "meta" not in tables:
                raise OddlingError(f"{self.path} is an SQLite database but not an oddling log")
            for statement in _SCHEMA.split(";\n"):
                if statement.strip():
                    conn.execute(statement)
            version = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
            if version is None:
                conn.execute("INSERT INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
                conn.execute("INSERT INTO meta VALUES ('created', ?)", (utc_now(),))
                if bank_path is not None:
                    conn.execute("INSERT INTO meta VALUES ('bank', ?)", (str(bank_path),))
            elif int(version[0]) > SCHEMA_VERSION:
                raise OddlingError(f"log {self.path} has schema version {version[0]}; this oddling reads "
                                   f"version {SCHEMA_VERSION}: upgrade oddling")

    class _Tx:
        def __init__(self, log: "ScoreLog"):
            self.log = log

        def __enter__(self):
            self.log._lock.acquire()
            try:
                self.log._conn.execute("BEGIN IMMEDIATE")
            except BaseException:
                self.log._lock.release()
                raise
            return self.log._conn

        def __exit__(self, kind, value, tb):
            try:
                self.log._conn.execute("COMMIT" if kind is None else "ROLLBACK")
            finally:
                self.log._lock.release()
            return False

    def _transaction(self):
        return ScoreLog._Tx(self)

    # -- writing --

    def append(self, rows: list[LogRow]) -> list[int]:
        """Append rows in one transaction (all or none); their ids, in order."""
        if not rows:
            return []
        now = utc_now()
        values = []
        for row in rows:
            if row.source not in SOURCES:
                raise ValueError(f"source must be one of {SOURCES}, got: {row.source!r}")
            values.append((
                row.time or now, row.source, row.name, row.path, row.sha256,
                None if row.score is None else float(row.score),
                None if row.p_value is None else float(row.p_value),
                None if row.flagged is None else int(bool(row.flagged)),
                row.nearest, None if row.nearest_distance is None else float(row.nearest_distance),
                None if row.neighbours is None else json.dumps(row.neighbours),
                row.health, row.status, row.bank, row.request,
            ))
        with self._transaction() as conn:
            ids = []
            for value in values:
                ids.append(conn.execute(
                    "INSERT INTO scored (time, source, name, path, sha256, score, p_value, flagged, nearest, "
                    "nearest_distance, neighbours, health, status, bank, request) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", value).lastrowid)
        return ids

    # -- reading --

    def meta(self) -> dict[str, str]:
        with self._lock:
            return dict(self._conn.execute("SELECT key, value FROM meta").fetchall())

    def rows(self, *, since: str | None = None, until: str | None = None, last: int | None = None,
             bank: str | None = None, source: str | None = None, ok_only: bool = False) -> list[LogRow]:
        """Rows in insertion order; `since`/`until` are log times (see parse_time), `last` keeps the
        newest N of what matches."""
        where, args = [], []
        for column, op, value in (("time", ">=", since), ("time", "<", until), ("bank", "=", bank),
                                  ("source", "=", source)):
            if value is not None:
                where.append(f"{column} {op} ?")
                args.append(value)
        if ok_only:
            where.append("status = 'ok' AND score IS NOT NULL")
        sql = "SELECT * FROM scored" + (" WHERE " + " AND ".join(where) if where else "")
        if last is not None:
            if int(last) < 1:
                raise OddlingError(f"--last must be >= 1, got: {last}")
            sql = f"SELECT * FROM ({sql} ORDER BY id DESC LIMIT {int(last)})"
        sql += " ORDER BY id"
        with self._lock:
            cursor = self._conn.execute(sql, args)
            names = [d[0] for d in cursor.description]
            found = cursor.fetchall()
        return [_row(dict(zip(names, values))) for values in found]

    def count(self) -> int:
        with self._lock:
            return int(self._conn.execute("SELECT COUNT(*) FROM scored").fetchone()[0])

    def seen_hashes(self, *, bank: str | None = None, source: str | None = None) -> set[str]:
        where, args = ["sha256 IS NOT NULL"], []
        for column, value in (("bank", bank), ("source", source)):
            if value is not None:
                where.append(f"{column} = ?")
                args.append(value)
        with self._lock:
            return {r[0] for r in self._conn.execute(
                f"SELECT DISTINCT sha256 FROM scored WHERE {' AND '.join(where)}", args)}

    def seen_unhashed_names(self, *, bank: str | None = None, source: str | None = None) -> set[str]:
        """Names of rows refused before their content was read (no hash): what a watcher must not log twice."""
        where, args = ["sha256 IS NULL"], []
        for column, value in (("bank", bank), ("source", source)):
            if value is not None:
                where.append(f"{column} = ?")
                args.append(value)
        with self._lock:
            return {r[0] for r in self._conn.execute(
                f"SELECT DISTINCT name FROM scored WHERE {' AND '.join(where)}", args)}

    def integrity(self) -> str:
        with self._lock:
            return str(self._conn.execute("PRAGMA integrity_check").fetchone()[0])

    def close(self) -> None:
        with self._lock:
            try:
                self._conn.close()
            except sqlite3.Error:
                pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def _row(record: dict) -> LogRow:
    neighbours = record.get("neighbours")
    flagged = record.get("flagged")
    return LogRow(**(record | {"neighbours": json.loads(neighbours) if neighbours else None,
                               "flagged": None if flagged is None else bool(flagged)}))


def open_log(path: str | os.PathLike | None = None, *, bank_path: str | os.PathLike | None = None,
             create: bool = True) -> ScoreLog:
    """The log at `path`, or the bank's default log (`<bank>.log.sqlite`) when `path` is None."""
    if path is None:
        if bank_path is None:
            raise OddlingError("give the log's path or the bank it belongs to")
        path = default_log_path(bank_path)
    return ScoreLog(path, create=create, bank_path=bank_path)
