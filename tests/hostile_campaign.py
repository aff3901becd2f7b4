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
import json
import os
import re
import shutil
import signal
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


def run(args, case: Case | None = None, **kwargs) -> subprocess.CompletedProcess:
    done = subprocess.run([PY, "-m", "oddling.cli", *map(str, args)], capture_output=True, text=True, env=ENV,
                          **kwargs)
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
                 incoming: Path | None = None) -> None:
    out = world.root / "out" / f"{case.group}-{len(CASES)}.csv"
    out.parent.mkdir(exist_ok=True)
    done = run(["score", incoming or world.incoming, "--bank", bank, "--out", out, "--quiet", "--cache-dir", cache],
               case)
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
    if warn and "warning:" not in done.stderr:
        case.fail("damage passed without a warning", "silent")


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

def chunks(cache: Path) -> list[Path]:
    return sorted(cache.glob("embeddings/*/chunk-*.npz"))


def rewrite(chunk: Path, **arrays) -> None:
    with np.load(chunk) as data:
        content = {k: data[k] for k in data.files}
    content.update(arrays)
    with open(chunk, "wb") as f:
        np.savez(f, **content)


def poison(chunk: Path) -> None:
    with np.load(chunk) as data:
        vectors = data["vectors"]
    rewrite(chunk, vectors=np.repeat(vectors[:1], len(vectors), axis=0))   # every image looks like one normal one


def swap_rows(chunk: Path) -> None:
    with np.load(chunk) as data:
        vectors = data["vectors"]
    rewrite(chunk, vectors=np.ascontiguousarray(vectors[::-1]))


def rename_hashes(chunk: Path) -> None:
    with np.load(chunk) as data:
        hashes = data["sha256"]
    rewrite(chunk, sha256=np.roll(hashes, 1))


def unsign(chunk: Path) -> None:
    with np.load(chunk) as data:
        content = {k: data[k] for k in data.files if k != "mac"}
    with open(chunk, "wb") as f:
        np.savez(f, **content)


def key_of(cache: Path) -> Path:
    [key] = cache.glob("embeddings/*/cache.key")
    return key


def many_garbage(cache: Path) -> None:
    folder = chunks(cache)[0].parent
    for i in range(70):
        (folder / f"chunk-{i:032x}.npz").write_bytes(b"" if i % 2 else os.urandom(64))


def nan_vectors(cache: Path) -> None:
    chunk = chunks(cache)[0]
    with np.load(chunk) as data:
        vectors = data["vectors"]
    rewrite(chunk, vectors=np.full_like(vectors, np.nan))


def folder_for_a_chunk(cache: Path) -> None:
    chunk = chunks(cache)[0]
    chunk.unlink()
    chunk.mkdir()


def key_a_link(cache: Path) -> None:
    key = key_of(cache)
    key.unlink()
    key.symlink_to("/dev/zero")


CACHE_DAMAGE = [
    ("chunk zero bytes", lambda c: [p.write_bytes(b"") for p in chunks(c)], True),
    ("chunk garbage", lambda c: [p.write_bytes(os.urandom(500)) for p in chunks(c)], True),
    ("chunk truncated", lambda c: [p.write_bytes(p.read_bytes()[:400]) for p in chunks(c)], True),
    ("poisoned vectors (one normal vector for all)", lambda c: [poison(p) for p in chunks(c)], True),
    ("vectors swapped between images", lambda c: [swap_rows(p) for p in chunks(c)], True),
    ("content hashes moved to other vectors", lambda c: [rename_hashes(p) for p in chunks(c)], True),
    ("unsigned chunk (earlier release layout)", lambda c: [unsign(p) for p in chunks(c)], True),
    ("NaN vectors", nan_vectors, True),
    ("key file deleted", lambda c: key_of(c).unlink(), False),
    ("key file readable by others", lambda c: key_of(c).chmod(0o644), True),
    ("key file replaced by another key", lambda c: key_of(c).write_bytes(os.urandom(32)), True),
    ("key file a symbolic link", key_a_link, True),
    ("70 unreadable chunks (compaction)", many_garbage, True),
    ("a folder where a chunk should be", folder_for_a_chunk, True),
]


def cache_corruptions(world: World) -> None:
    for name, damage, warn in CACHE_DAMAGE:
        case = Case("cache corruption", name)
        CASES.append(case)
        cache = world.fresh_cache(f"c{len(CASES)}")
        damage(cache)
        # (a deleted key is a fresh cache whose old chunks no longer verify: a warning is not required)
        expect_score(world, case, world.bank, cache, world.csv_bytes, warn=warn)


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
