"""Hostile campaign: the real CLI, in subprocesses, against damaged banks, damaged and poisoned
caches, kill -9 at chosen points of fit and score, and four concurrent `bank add` writers.

    python tests/hostile_campaign.py [--out tests/hostile_campaign_RESULTS.txt]

Not part of the test suite (no `test_` prefix, so pytest does not collect it); it takes several
minutes. Every case runs on temporary folders with a bank of 12 tiny images and the default
representation. It prints a table: cases tried, tracebacks (stderr containing "Traceback"; must
be 0), silent drops (damage accepted without a word, or input files without a row) and lost or
corrupted data (output bytes that differ from a clean run, references lost by a writer).
"""
from __future__ import annotations

import argparse
import hashlib
import json
import os
import re
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
ENV = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT / "src")] + [p for p in [os.environ.get("PYTHONPATH")] if p]))
PY = sys.executable
# Permissions do not stop root: run as root, a command drops the capabilities that override them (Linux).
HONOUR_PERMISSIONS = ["setpriv", "--bounding-set=-dac_override,-dac_read_search,-fowner", "--"] \
    if os.geteuid() == 0 else []
LEFTOVER = re.compile(r"\.(writing|old|discard)-\d+|\.partial")


@dataclass
class Case:
    group: str
    name: str
    ok: bool = True
    traceback: bool = False
    silent: bool = False
    lost: bool = False
    notes: list[str] = field(default_factory=list)

    def fail(self, note: str, kind: str | None = None) -> None:
        self.ok = False
        if kind:
            setattr(self, kind, True)
        self.notes.append(note)


CASES: list[Case] = []


# The CLI, counting the images whose features came from the embedding cache (the last stderr line).
COUNT_HITS = """
import atexit, sys
import oddling.embedding.cache as cache
hits = []
real_get = cache.EmbeddingCache.get
def get(self, digest):
    found = real_get(self, digest)
    hits.append(found is not None)
    return found
cache.EmbeddingCache.get = get
atexit.register(lambda: print(f"cache hits: {sum(hits)}", file=sys.stderr))
from oddling.cli import main
sys.argv = ["oddling"] + sys.argv[1:]
main()
"""


def run(args, case: Case | None = None, prefix=(), launch=("-m", "oddling.cli"),
        **kwargs) -> subprocess.CompletedProcess:
    command = [*prefix, PY, *launch, *map(str, args)]
    try:
        done = subprocess.run(command, capture_output=True, text=True, env=ENV, **kwargs)
    except subprocess.TimeoutExpired as exc:   # killed: a hang fails its case instead of stopping the campaign
        if case is not None:
            case.fail(f"no answer after {exc.timeout:.0f} s (blocked)")
        return subprocess.CompletedProcess(command, -signal.SIGKILL, "", "timed out")
    if case is not None and "Traceback" in done.stderr:
        case.fail("traceback: " + done.stderr.strip().splitlines()[-1][:160], "traceback")
    return done


def images(folder: Path, n: int, seed: int, size=(32, 32)) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        out.append(folder / f"s{seed}_{i:03d}.png")
        base = rng.integers(0, 255, 3)
        noise = rng.normal(0, 25, (*size, 3))
        Image.fromarray(np.clip(base + noise, 0, 255).astype(np.uint8)).save(out[-1])
    return out


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.rglob("*") if LEFTOVER.search(p.name) or p.name.endswith(".lock"))


def comparable(bank: Path) -> dict:
    """A bank's content without its creation time: what two runs on the same inputs must share."""
    meta = json.loads((bank / "bank.json").read_text())
    meta.pop("created")
    arrays = {p.name: p.read_bytes() for p in sorted(bank.glob("*.npy"))}
    return {"meta": meta, "arrays": arrays}


# --- setting up -----------------------------------------------------------------------------------

class World:
    def __init__(self, root: Path):
        self.root = root
        self.cache = root / "cache"
        self.refs = root / "refs"
        self.incoming = root / "incoming"
        self.big = root / "big"
        images(self.refs, 12, seed=1)
        images(self.incoming, 4, seed=2)
        shutil.copy(self.refs / "s1_000.png", self.incoming / "copy_of_ref.png")
        (self.incoming / "empty.png").write_bytes(b"")
        (self.incoming / "notes.txt").write_text("not an image")
        images(self.big, 160, seed=3)
        self.bank = root / "base.bank"
        self.must(["fit", self.refs, "--bank", self.bank, "--target-fpr", "0.2", "--quiet", "--cache-dir", self.cache])
        self.csv = root / "reference.csv"
        self.must(["score", self.incoming, "--bank", self.bank, "--out", self.csv, "--quiet", "--no-cache",
                   "--cache-dir", self.cache])
        self.csv_bytes = self.csv.read_bytes()
        self.warm_cache = root / "warm-cache"      # the vectors of refs and incoming, nothing else
        shutil.copytree(self.cache / "onnx", self.warm_cache / "onnx")   # the same export for every run
        self.must(["score", self.incoming, "--bank", self.bank, "--out", root / "warm.csv", "--quiet",
                   "--cache-dir", self.warm_cache])
        self.must(["score", self.refs, "--bank", self.bank, "--out", root / "warm2.csv", "--quiet",
                   "--cache-dir", self.warm_cache])
        self.big_bank = root / "big.bank"
        self.must(["fit", self.big, "--bank", self.big_bank, "--target-fpr", "0.2", "--quiet", "--no-cache",
                   "--cache-dir", self.cache])
        self.big_csv = root / "big.csv"
        self.must(["score", self.big, "--bank", self.bank, "--out", self.big_csv, "--quiet", "--no-cache",
                   "--cache-dir", self.cache])

    def must(self, args):
        done = run(args)
        if done.returncode != 0:
            sys.exit(f"setup failed: oddling {' '.join(map(str, args))}\n{done.stderr}")
        return done

    def fresh_cache(self, name: str) -> Path:
        """A copy of the warm cache (its ONNX export included, so no case pays for one)."""
        folder = self.root / "caches" / name
        shutil.copytree(self.warm_cache, folder)
        return folder


def expect_score(world: World, case: Case, bank: Path, cache: Path, expected_csv: bytes | None, *, warn: bool,
                 incoming: Path | None = None, says: str | None = None, reused: bool | None = None, prefix=()) -> None:
    """Score and compare with a clean run. Damage to the cache is reported in at most one warning
    line (exactly one with `warn`, holding `says`); `reused`: whether features must (True) or must
    not (False) come from the cache."""
    out = world.root / "out" / f"{case.group}-{len(CASES)}.csv"
    out.parent.mkdir(exist_ok=True)
    done = run(["score", incoming or world.incoming, "--bank", bank, "--out", out, "--quiet", "--cache-dir", cache],
               case, prefix, launch=("-c", COUNT_HITS) if reused is not None else ("-m", "oddling.cli"), timeout=600)
    if done.returncode != 0:
        case.fail(f"score exit {done.returncode}: {done.stderr.strip()[-200:]}")
        return
    data = out.read_bytes()
    names = {p.name for p in (incoming or world.incoming).iterdir() if not p.name.startswith(".")}
    rows = len(data.decode().strip().splitlines()) - 1
    if rows != len(names):
        case.fail(f"{rows} rows for {len(names)} files", "silent")
    if expected_csv is not None and data != expected_csv:
        case.fail("scores differ from a clean run", "lost")
    cache_warnings = [line for line in done.stderr.splitlines()
                      if line.startswith("warning:") and "embedding cache" in line]
    if warn and not cache_warnings:
        case.fail("damage passed without a warning", "silent")
    elif len(cache_warnings) > 1:
        case.fail(f"{len(cache_warnings)} warning lines for one damage: {cache_warnings}")
    elif says and cache_warnings and says not in cache_warnings[0]:
        case.fail(f"the warning does not say {says!r}: {cache_warnings[0][:200]}")
    if reused is not None:
        hits = int(re.findall(r"cache hits: (\d+)", done.stderr)[-1])
        if reused and not hits:
            case.fail("the cache's intact rows were not used (every image embedded again)")
        if not reused and hits:
            case.fail(f"{hits} images took their features from a damaged cache", "silent")


# --- 1. bank tamperings -------------------------------------------------------------------------

def edit_json(change):
    def apply(bank: Path):
        path = bank / "bank.json"
        meta = json.loads(path.read_text())
        result = change(meta)
        path.write_text(json.dumps(meta if result is None else result))
    return apply


def write_bytes(name: str, data: bytes):
    return lambda bank: (bank / name).write_bytes(data)


def edit_array(name: str, change):
    def apply(bank: Path):
        array = np.load(bank / name)
        np.save(bank / name, change(array), allow_pickle=True)
    return apply


def drop(name: str):
    return lambda bank: (bank / name).unlink()


def pop(*keys):
    def change(meta):
        target = meta
        for k in keys[:-1]:
            target = target[k]
        target.pop(keys[-1])
    return change


def put(value, *keys):
    def change(meta):
        target = meta
        for k in keys[:-1]:
            target = target[k]
        target[keys[-1]] = value
    return change


def shorter_references(meta):
    meta["references"] = meta["references"][:-1]
    meta["n_references"] -= 1


REQUIRED = ["format", "format_version", "tool_version", "created", "representation", "detector", "calibration",
            "reference_root", "n_references", "references"]

TAMPERINGS = [
    ("bank.json a list", write_bytes("bank.json", b"[]"), "refuse"),
    ("bank.json a number", write_bytes("bank.json", b"42"), "refuse"),
    ("bank.json a string", write_bytes("bank.json", b'"bank"'), "refuse"),
    ("bank.json null", write_bytes("bank.json", b"null"), "refuse"),
    ("bank.json not UTF-8", write_bytes("bank.json", b'{"format": "\xff\xfe"}'), "refuse"),
    ("bank.json empty", write_bytes("bank.json", b""), "refuse"),
    ("bank.json truncated", lambda b: (b / "bank.json").write_bytes((b / "bank.json").read_bytes()[:300]), "refuse"),
    ("bank.json deeply nested", write_bytes("bank.json", b"[" * 100000 + b"]" * 100000), "refuse"),
    *[(f"missing {name}", edit_json(pop(name)), "refuse") for name in REQUIRED],
    # optional (banks without fences score without the health column's findings): rows, not bytes
    ("missing health_fences (optional)", edit_json(pop("health_fences")), "accept rows"),
    ("unknown extra field", edit_json(put({"x": 1}, "extra")), "accept"),
    ("format other", edit_json(put("zip", "format")), "refuse"),
    ("format_version '2'", edit_json(put("2", "format_version")), "refuse"),
    ("format_version 1 on a v2 bank", edit_json(put(1, "format_version")), "refuse"),
    ("representation a list", edit_json(put([], "representation")), "refuse"),
    ("representation dim a string", edit_json(put("1280", "representation", "dim")), "refuse"),
    ("representation id changed", edit_json(put("efficientnet-lite4", "representation", "id")), "refuse"),
    ("weights sha256 changed", edit_json(put("0" * 64, "representation", "backbone_fingerprint", "weights_sha256")),
     "refuse"),
    ("detector a string", edit_json(put("knn", "detector")), "refuse"),
    ("detector name unknown", edit_json(put("magic", "detector", "name")), "refuse"),
    ("k 0", edit_json(put(0, "detector", "params", "k")), "refuse"),
    ("k 1000", edit_json(put(1000, "detector", "params", "k")), "refuse"),
    ("k 'x'", edit_json(put("x", "detector", "params", "k")), "refuse"),
    ("k -1", edit_json(put(-1, "detector", "params", "k")), "refuse"),
    ("k 2.5", edit_json(put(2.5, "detector", "params", "k")), "refuse"),
    ("k true", edit_json(put(True, "detector", "params", "k")), "refuse"),
    ("unknown detector parameter", edit_json(put(1, "detector", "params", "spin")), "refuse"),
    ("calibration a number", edit_json(put(3, "calibration")), "refuse"),
    ("cutoff a string", edit_json(put("high", "calibration", "cutoff")), "refuse"),
    ("cutoff a list", edit_json(put([0.1], "calibration", "cutoff")), "refuse"),
    ("cutoff not what the scores give", edit_json(put(0.5, "calibration", "cutoff")), "refuse"),
    ("target_fpr 5", edit_json(put(5, "calibration", "target_fpr")), "refuse"),
    ("target_fpr 0", edit_json(put(0, "calibration", "target_fpr")), "refuse"),
    ("target_fpr NaN", edit_json(put(float("nan"), "calibration", "target_fpr")), "refuse"),
    ("target_fpr a string", edit_json(put("0.2", "calibration", "target_fpr")), "refuse"),
    ("health fences a list", edit_json(put([1, 2], "health_fences")), "refuse"),
    ("health fence a string", edit_json(put("x", "health_fences", "brightness")), "refuse"),
    ("health fence q1 a string", edit_json(put("low", "health_fences", "brightness", "q1")), "refuse"),
    ("health fence pair of one", edit_json(put([1], "health_fences", "brightness", "unusual")), "refuse"),
    ("health fence NaN", edit_json(put([float("nan"), 1], "health_fences", "brightness", "far_out")), "refuse"),
    ("n_references a string", edit_json(put("12", "n_references")), "refuse"),
    ("n_references true", edit_json(put(True, "n_references")), "refuse"),
    ("n_references 13", edit_json(put(13, "n_references")), "refuse"),
    ("references a dict", edit_json(put({}, "references")), "refuse"),
    ("reference a string", edit_json(lambda m: m["references"].__setitem__(0, "r.png")), "refuse"),
    ("reference sha256 a number", edit_json(lambda m: m["references"][0].__setitem__("sha256", 5)), "refuse"),
    ("references shorter than the arrays", edit_json(shorter_references), "refuse"),
    ("reference_root a number", edit_json(put(5, "reference_root")), "refuse"),
    ("skipped a string", edit_json(put("none", "skipped")), "refuse"),
    ("features zero bytes", write_bytes("features.npy", b""), "refuse"),
    ("features missing", drop("features.npy"), "refuse"),
    ("features garbage", write_bytes("features.npy", os.urandom(2000)), "refuse"),
    ("features strings", edit_array("features.npy", lambda a: a.astype(str)), "refuse"),
    ("features pickled objects", edit_array("features.npy", lambda a: np.array([{"x": 1}], dtype=object)), "refuse"),
    ("features 3-D", edit_array("features.npy", lambda a: a[:, :, None]), "refuse"),
    ("features NaN", edit_array("features.npy", lambda a: np.full_like(a, np.nan)), "refuse"),
    ("features x1000", edit_array("features.npy", lambda a: a * 1000), "refuse"),
    ("features wrong dim", edit_array("features.npy", lambda a: np.ascontiguousarray(a[:, :7])), "refuse"),
    ("features one row short", edit_array("features.npy", lambda a: a[:-1]), "refuse"),
    ("calibration 2-D", edit_array("calibration_scores.npy", lambda a: a[:, None]), "refuse"),
    ("calibration NaN", edit_array("calibration_scores.npy", lambda a: np.full_like(a, np.nan)), "refuse"),
    ("calibration empty", edit_array("calibration_scores.npy", lambda a: a[:0]), "refuse"),
    ("calibration strings", edit_array("calibration_scores.npy", lambda a: a.astype(str)), "refuse"),
    ("calibration zero bytes", write_bytes("calibration_scores.npy", b""), "refuse"),
    ("health rows wrong width", edit_array("health_stats.npy", lambda a: a[:, :3]), "refuse"),
    ("health rows one short", edit_array("health_stats.npy", lambda a: a[:-1]), "refuse"),
    ("health 1-D", edit_array("health_stats.npy", lambda a: a[:, 0]), "refuse"),
    ("health NaN", edit_array("health_stats.npy", lambda a: np.full_like(a, np.nan)), "refuse"),
    ("health zero bytes", write_bytes("health_stats.npy", b""), "refuse"),
    ("stray detector array", lambda b: np.save(b / "detector.extra.npy", np.zeros(3)), "refuse"),
]


def bank_tamperings(world: World) -> None:
    cache = world.fresh_cache("tamper")
    extra = world.root / "extra"
    images(extra, 2, seed=9)
    for name, tamper, expected in TAMPERINGS:
        case = Case("bank tampering", name)
        CASES.append(case)
        bank = world.root / "tampered" / f"t{len(CASES)}.bank"
        shutil.copytree(world.bank, bank)
        tamper(bank)
        if expected.startswith("accept"):
            expect_score(world, case, bank, cache, world.csv_bytes if expected == "accept" else None, warn=False)
            continue
        # Every bank is scored; damaged arrays also go through the commands that use the
        # references' arrays (bank add refits on them, audit reads them). Each must refuse with
        # one line and exit 2.
        commands = [["score", world.incoming, "--bank", bank, "--out", world.root / "x.csv", "--force", "--quiet",
                     "--cache-dir", cache]]
        if name.split()[0] in ("features", "calibration", "health", "stray", "references"):
            commands += [["bank", "add", bank, extra, "--quiet", "--cache-dir", cache], ["audit", "--bank", bank]]
        for command in commands:
            done = run(command, case)
            errors = [line for line in done.stderr.splitlines() if line.startswith("Error:")]
            what = " ".join(map(str, command[:2])) if command[0] == "bank" else command[0]
            if done.returncode == 0:
                case.fail(f"{what}: damaged bank accepted", "silent")
            elif done.returncode != 2 or len(errors) != 1:
                case.fail(f"{what}: exit {done.returncode}, {len(errors)} error lines: {done.stderr.strip()[-160:]}")


# --- 2. cache corruptions -------------------------------------------------------------------------
# The embedding cache is one SQLite database per cache key, <cache>/embeddings/<key>/features.sqlite,
# with a signed row per content hash and the signing key beside it (src/oddling/embedding/cache.py).
# Each case damages a copy of the warm cache behind oddling's back, with Python's own sqlite3 module
# or the file system, and scores the incoming folder: the scores must be those of a clean run.

def database(cache: Path) -> Path:
    [db] = cache.glob("embeddings/*/features.sqlite")
    return db


def key_of(cache: Path) -> Path:
    [key] = cache.glob("embeddings/*/cache.key")
    return key


def sql(db: Path, statement: str, args=()) -> list[tuple]:
    conn = sqlite3.connect(db, isolation_level=None)
    try:
        return conn.execute(statement, args).fetchall()
    finally:
        conn.close()   # the last connection: SQLite moves the WAL into the file and removes it


def rows(db: Path) -> list[tuple]:
    return sql(db, "SELECT sha256, vector, health, mac FROM features ORDER BY sha256")


def rewrite_rows(db: Path, new_rows: list[tuple]) -> None:
    conn = sqlite3.connect(db, isolation_level=None)
    try:
        conn.execute("BEGIN")
        conn.execute("DELETE FROM features")
        conn.executemany("INSERT INTO features VALUES (?, ?, ?, ?)", new_rows)
        conn.execute("COMMIT")
    finally:
        conn.close()


def signer(db: Path):
    """The row signature oddling would write: what only someone who can read the key file can make."""
    sys.path.insert(0, str(ROOT / "src"))
    from oddling.embedding.cache import EmbeddingCache

    cache = EmbeddingCache(db.parent)
    cache._key, _ = cache._secret()
    return cache._mac


def whole_file(cache: Path, change) -> None:
    db = database(cache)
    assert not Path(f"{db}-wal").exists()            # every row is in the file itself
    db.write_bytes(change(db.read_bytes()))


def poison(cache: Path) -> None:
    db = database(cache)
    sql(db, "UPDATE features SET vector = (SELECT vector FROM features ORDER BY sha256 LIMIT 1)")


def swap_rows(cache: Path) -> None:
    db = database(cache)
    old = rows(db)
    rewrite_rows(db, [(d, v, h, m) for (d, _, h, m), (_, v, _, _) in zip(old, old[::-1])])


def rename_hashes(cache: Path) -> None:
    db = database(cache)
    old = rows(db)
    rewrite_rows(db, [(d, v, h, m) for (d, *_), (_, v, h, m) in zip(old, old[1:] + old[:1])])


def nan_vectors(cache: Path) -> None:
    db = database(cache)
    mac = signer(db)
    new_rows = []
    for digest, vector, health, _ in rows(db):
        nan = np.full(len(vector) // 4, np.nan, "<f4").tobytes()     # the right length, NaN throughout
        new_rows.append((digest, nan, health, mac(digest, nan, health)))
    rewrite_rows(db, new_rows)


def other_layout(cache: Path) -> None:
    db = database(cache)
    sql(db, "DROP TABLE features")
    sql(db, "CREATE TABLE features (sha256 TEXT PRIMARY KEY, vector BLOB)")


def link_to_dev_zero(path: Path) -> None:
    path.unlink()
    path.symlink_to("/dev/zero")


def fifo_for(path: Path) -> None:   # opening it to read waits for a writer
    path.unlink()
    os.mkfifo(path)


def folder_for_the_database(cache: Path) -> None:
    db = database(cache)
    db.unlink()
    db.mkdir()


def stale_file(suffix: str):
    def apply(cache: Path) -> None:
        Path(f"{database(cache)}{suffix}").write_bytes(os.urandom(4096))
    return apply


def read_only(cache: Path) -> None:
    db = database(cache)
    db.chmod(0o444)
    db.parent.chmod(0o555)   # 0444 would forbid opening anything inside: the file could not be read at all


def read_only_file(cache: Path) -> None:
    db = database(cache)
    incoming = cache.parents[1] / "incoming"          # World.fresh_cache's layout
    digest = hashlib.sha256((incoming / "s2_000.png").read_bytes()).hexdigest()
    assert sql(db, "DELETE FROM features WHERE sha256 = ? RETURNING sha256", (digest,))
    db.chmod(0o444)


def garbage_chunk(cache: Path) -> None:
    (database(cache).parent / f"chunk-{'0' * 32}.npz").write_bytes(os.urandom(600))


# (name, damage, warn: a warning is owed, what it must say, reused: whether the features of the
# rows must (True) or must not (False) come from the cache, None where some may and some may not)
CACHE_DAMAGE = [
    # an empty file is an empty database to SQLite: everything is embedded again, nothing to report
    ("database zero bytes", lambda c: whole_file(c, lambda data: b""), False, None, False),
    ("database garbage", lambda c: whole_file(c, lambda data: os.urandom(len(data))), True, "fresh one", False),
    # (rows on the pages before the cut may still be read before the damage shows)
    ("database truncated", lambda c: whole_file(c, lambda data: data[:len(data) // 3]), True, "fresh one", None),
    ("features table of another layout", other_layout, True, "not an oddling embedding cache", False),
    ("schema version of a newer oddling",
     lambda c: sql(database(c), "UPDATE meta SET value = '99' WHERE key = 'schema_version'"), True, "newer", False),
    # (the row whose vector was copied is still its own, and may be used)
    ("poisoned vectors (one normal vector for all)", poison, True, "signature does not match", None),
    ("vectors swapped between rows", swap_rows, True, "signature does not match", None),
    ("content hashes moved to other rows", rename_hashes, True, "signature does not match", False),
    ("signatures cleared", lambda c: sql(database(c), "UPDATE features SET mac = x''"), True,
     "signature does not match", False),
    ("NaN vectors, right length, signed with the cache's key", nan_vectors, True, "NaN", False),
    ("vectors one float short", lambda c: sql(database(c), "UPDATE features SET vector = substr(vector, 5)"), True,
     "expected", False),
    ("text where a vector was", lambda c: sql(database(c), "UPDATE features SET vector = 'x'"), True,
     "not binary", False),
    # (a deleted key is a fresh key: the old rows no longer verify, a warning is not required)
    ("key file deleted", lambda c: key_of(c).unlink(), False, None, False),
    ("key file readable by others", lambda c: key_of(c).chmod(0o644), True, "a new key was made", False),
    ("key file replaced by another key", lambda c: key_of(c).write_bytes(os.urandom(32)), True,
     "signature does not match", False),
    ("key file a symbolic link to /dev/zero", lambda c: link_to_dev_zero(key_of(c)), True, "a new key was made", False),
    ("key file a FIFO", lambda c: fifo_for(key_of(c)), True, "a new key was made", False),
    # (oddling does not remove a folder: it is reported, and the run goes on without the cache)
    ("a folder where the database should be", folder_for_the_database, True, "not a regular file", False),
    ("a FIFO where the database should be", lambda c: fifo_for(database(c)), True, "fresh one", False),
    ("database a symbolic link to /dev/zero", lambda c: link_to_dev_zero(database(c)), True, "fresh one", False),
    # SQLite ignores a WAL or journal whose header is not its own: the rows in the file are used
    ("stale -wal file of garbage", stale_file("-wal"), False, None, True),
    ("stale -journal file of garbage", stale_file("-journal"), False, None, True),
    ("database and its folder read-only", read_only, True, "features already in it are used", True),
    # (one row is gone, so there is something to save, and saving it fails)
    ("database file read-only, its folder writable", read_only_file, True, "could not save", True),
    ("garbage chunk file of an earlier release", garbage_chunk, True, "damaged chunk files", True),
]


def cache_corruptions(world: World) -> None:
    for name, damage, warn, says, reused in CACHE_DAMAGE:
        case = Case("cache corruption", name)
        CASES.append(case)
        cache = world.fresh_cache(f"c{len(CASES)}")
        damage(cache)
        expect_score(world, case, world.bank, cache, world.csv_bytes, warn=warn, says=says, reused=reused,
                     prefix=HONOUR_PERMISSIONS if "read-only" in name else ())


# --- 3. kill -9 at five points --------------------------------------------------------------------

KILL_AT = """
import os, signal, sys, json
import oddling.bank.store as store
import oddling.reporting.results as results
point = sys.argv[1]
real_replace, real_dump = os.replace, json.dump

def die():
    os.kill(os.getpid(), signal.SIGKILL)

def replace(src, dst):
    src, dst = os.fspath(src), os.fspath(dst)
    if point == "fit: between the two renames" and ".writing-" in src and not os.path.exists(dst):
        die()
    if point == "score: CSV written, not renamed" and ".partial-" in src:
        die()
    return real_replace(src, dst)

def dump(obj, f, *a, **k):
    if point == "fit: arrays written, bank.json half written":
        f.write('{"format": "oddling-bank", ')
        f.flush()
        die()
    return real_dump(obj, f, *a, **k)

store.os.replace = replace
store.json.dump = dump
from oddling.cli import main
sys.argv = ["oddling"] + sys.argv[2:]
main()
"""


def kill_when_progress(args, at: int, total: int) -> int:
    """Run the CLI with its progress bar; SIGKILL it once `at` of `total` images are embedded."""
    proc = subprocess.Popen([PY, "-m", "oddling.cli", *map(str, args)], stderr=subprocess.PIPE, env=ENV)
    seen = b""
    while True:
        byte = proc.stderr.read(1)
        if not byte:
            break
        seen += byte
        done = [int(n) for n in re.findall(rb"(\d+)/%d" % total, seen)]
        if done and max(done) >= at:
            proc.send_signal(signal.SIGKILL)
            break
    proc.stderr.read()
    proc.wait()
    return proc.returncode


def kills(world: World) -> None:
    n_big = len(list(world.big.iterdir()))
    reference_bank = comparable(world.big_bank)

    def check_bank(case, target, cache):
        done = run(["fit", world.big, "--bank", target, "--target-fpr", "0.2", "--quiet", "--force",
                    "--cache-dir", cache], case)
        if done.returncode != 0:
            case.fail(f"rerun exit {done.returncode}: {done.stderr.strip()[-200:]}")
        elif comparable(target) != reference_bank:
            case.fail("the rerun's bank differs from a clean fit", "lost")
        if leftovers(target.parent):
            case.fail(f"leftovers {leftovers(target.parent)}")

    # 1. fit, killed while embedding; rerun resumes from the cache
    case = Case("kill -9", "fit: while embedding")
    CASES.append(case)
    cache = world.fresh_cache("k1")
    target = world.root / "k1" / "b.bank"
    target.parent.mkdir()
    rc = kill_when_progress(["fit", world.big, "--bank", target, "--target-fpr", "0.2", "--batch-size", "8",
                             "--cache-dir", cache], 40, n_big)
    if rc != -signal.SIGKILL:
        case.fail(f"not killed (exit {rc})")
    if target.exists():
        case.fail("a bank appeared from a killed fit", "lost")
    check_bank(case, target, cache)

    # 2-3. fit --force over an existing bank, killed inside the save
    for point in ("fit: between the two renames", "fit: arrays written, bank.json half written"):
        case = Case("kill -9", point)
        CASES.append(case)
        cache = world.fresh_cache(f"k{len(CASES)}")
        target = world.root / f"k{len(CASES)}" / "b.bank"
        target.parent.mkdir()
        shutil.copytree(world.bank, target)               # the bank being replaced: the 12-image one
        before = comparable(target)
        done = subprocess.run([PY, "-c", KILL_AT, point, "fit", str(world.big), "--bank", str(target),
                               "--target-fpr", "0.2", "--quiet", "--force", "--cache-dir", str(cache)],
                              capture_output=True, text=True, env=ENV)
        if done.returncode != -signal.SIGKILL:
            case.fail(f"not killed (exit {done.returncode}): {done.stderr.strip()[-200:]}")
        # The old bank is there (put back by the next reader, here the CLI, if the kill came
        # between the renames).
        cli_view = run(["bank", "info", target], case)
        if cli_view.returncode != 0:
            case.fail(f"bank info after the kill: {cli_view.stderr.strip()[-160:]}")
        if not (target / "bank.json").is_file() or comparable(target) != before:
            case.fail(f"the old bank was not kept: {cli_view.stderr.strip()[-200:]}", "lost")
        check_bank(case, target, cache)

    # 4. score, killed while embedding
    case = Case("kill -9", "score: while embedding")
    CASES.append(case)
    cache = world.fresh_cache("k4")
    out = world.root / "k4.csv"
    rc = kill_when_progress(["score", world.big, "--bank", world.bank, "--out", out, "--batch-size", "8",
                             "--cache-dir", cache], 40, n_big)
    if rc != -signal.SIGKILL:
        case.fail(f"not killed (exit {rc})")
    if out.exists():
        case.fail("a CSV appeared from a killed score", "lost")
    expect_score(world, case, world.bank, cache, world.big_csv.read_bytes(), warn=False, incoming=world.big)

    # 5. score --force over an existing CSV, killed after writing the temporary file
    case = Case("kill -9", "score: CSV written, not renamed")
    CASES.append(case)
    cache = world.fresh_cache("k5")
    out = world.root / "k5" / "scores.csv"
    out.parent.mkdir()
    out.write_text("the previous results\n")
    done = subprocess.run([PY, "-c", KILL_AT, case.name, "score", str(world.incoming), "--bank", str(world.bank),
                           "--out", str(out), "--quiet", "--force", "--cache-dir", str(cache)],
                          capture_output=True, text=True, env=ENV)
    if done.returncode != -signal.SIGKILL:
        case.fail(f"not killed (exit {done.returncode}): {done.stderr.strip()[-200:]}")
    if out.read_text() != "the previous results\n":
        case.fail("the previous CSV was damaged", "lost")
    rerun = run(["score", world.incoming, "--bank", world.bank, "--out", out, "--quiet", "--force",
                 "--cache-dir", cache], case)
    if rerun.returncode != 0 or out.read_bytes() != world.csv_bytes:
        case.fail("the rerun's CSV differs from a clean run", "lost")
    if leftovers(out.parent):
        case.fail(f"leftovers {leftovers(out.parent)}")


# --- 4. concurrent writers ------------------------------------------------------------------------

def concurrent_writers(world: World) -> None:
    case = Case("concurrent writers", "4 x bank add on one bank")
    CASES.append(case)
    cache = world.fresh_cache("w")
    target = world.root / "w" / "b.bank"
    target.parent.mkdir()
    shutil.copytree(world.bank, target)
    folders = []
    for i in range(4):
        folders.append(world.root / "w" / f"add{i}")
        images(folders[-1], 2, seed=20 + i)
    procs = [subprocess.Popen([PY, "-m", "oddling.cli", "bank", "add", str(target), str(f), "--quiet",
                               "--cache-dir", str(cache)], stderr=subprocess.PIPE, text=True, env=ENV)
             for f in folders]
    for proc in procs:
        err = proc.communicate()[1]
        if "Traceback" in err:
            case.fail("traceback in a writer", "traceback")
        if proc.returncode != 0:
            case.fail(f"writer exit {proc.returncode}: {err.strip()[-200:]}")
    info = run(["bank", "info", target, "--json"], case)
    meta = json.loads((target / "bank.json").read_text())
    names = {Path(r["path"]).name for r in meta["references"]}
    wanted = {p.name for f in folders for p in f.iterdir()}
    if info.returncode != 0 or not wanted <= names or len(names) != 12 + 8:
        case.fail(f"references after 4 writers: {len(names)} (want 20); missing {sorted(wanted - names)}", "lost")
    if leftovers(target.parent):
        case.fail(f"leftovers {leftovers(target.parent)}")


# --- the table ------------------------------------------------------------------------------------

def table() -> str:
    groups = ["bank tampering", "cache corruption", "kill -9", "concurrent writers"]
    lines = [f"{'group':22s} {'cases':>5s} {'passed':>6s} {'tracebacks':>10s} {'silent drops':>12s} "
             f"{'lost or corrupted':>17s}"]
    for group in groups + ["total"]:
        rows = [c for c in CASES if group in (c.group, "total")]
        lines.append(f"{group:22s} {len(rows):5d} {sum(c.ok for c in rows):6d} {sum(c.traceback for c in rows):10d} "
                     f"{sum(c.silent for c in rows):12d} {sum(c.lost for c in rows):17d}")
    failed = [c for c in CASES if not c.ok]
    if failed:
        lines += ["", "failed cases:"]
        lines += [f"  [{c.group}] {c.name}: {'; '.join(c.notes)}" for c in failed]
    lines += ["", "cases:"] + [f"  [{c.group}] {c.name}: {'ok' if c.ok else 'FAILED'}" for c in CASES]
    return "\n".join(lines) + "\n"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, help="also write the table here")
    parser.add_argument("--only", choices=["bank", "cache", "kill", "writers"], action="append")
    args = parser.parse_args()
    started = time.time()
    with tempfile.TemporaryDirectory(prefix="oddling-campaign-") as tmp:
        world = World(Path(tmp))
        for name, step in (("bank", bank_tamperings), ("cache", cache_corruptions), ("kill", kills),
                           ("writers", concurrent_writers)):
            if not args.only or name in args.only:
                step(world)
                print(f"{name}: done", file=sys.stderr, flush=True)
    text = (f"oddling hostile campaign (python tests/hostile_campaign.py), {len(CASES)} cases, "
            f"{time.time() - started:.0f} s\n\n" + table())
    print(text, end="")
    if args.out:
        args.out.write_text(text)
    return 0 if all(c.ok for c in CASES) else 1


if __name__ == "__main__":
    sys.exit(main())
