"""Memory and calibration figures for large banks, against what a user would write, in one run.

    nice -n 10 python benchmarks/bench_large.py [--n 1000000] [--queries 2000] [--f16-n 200000]
                                                [--images 5000,20000] [--out benchmarks/LARGE_RESULTS.md]

Prints figures, never asserts timings; each figure is set against a baseline measured in the
same run. Search speed and recall of the approximate indexes are in bench_index.py (its
synthetic clustered vectors are reused here).

A. Memory of scoring against a large bank. The clustered bank (default 1,000,000 x 1280
   float32, 5.1 GB) is written chunk by chunk into a .npy on disk, then, each in a fresh process:
   the baseline a user would write (`np.load` of the whole file, `faiss.IndexFlatIP`, search the
   queries) and oddling's path (the features memory-mapped, as `load_bank` maps them, searched
   by `ExactCosineIndex` straight from the map). Peak RSS is split into private memory
   (RssAnon, what the process owns) and file pages (RssFile, page cache shared with every
   process and dropped under pressure) from /proc/self/status at the end of the search.
B. float16 reference vectors: the same clustered vectors (default 200,000) searched exactly as
   float32 and as float16 (upcast in blocks, as a `--vector-dtype float16` bank is): the largest
   difference of the kNN score (mean cosine distance to the k nearest) over the queries, against
   the 1e-3 that `fit` requires, and the size on disk.
C. Fit on small generated JPEGs (default 5,000 and 20,000 of 96x96), each `oddling.fit` with the
   `pixels:16` representation (decode, resize, no network: the streaming, not the network, is
   measured) and no cache, in a fresh process: peak RSS and wall time; and the calibration time
   at 20,000 references (the kNN detector's exact leave-one-out), with its share of the fit.
"""
from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from bench_index import CHUNK, ClusteredBank  # noqa: E402

CHILD_SEARCH = r"""
import json, resource, sys, time
import numpy as np
import faiss

def status():
    out = {}
    with open("/proc/self/status") as f:
        for line in f:
            key, _, value = line.partition(":")
            if key in ("VmHWM", "RssAnon", "RssFile"):
                out[key] = int(value.split()[0]) / 1024
    return out

path, queries_path, k, how = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4]
queries = np.load(queries_path)
start = time.perf_counter()
if how == "baseline":          # what a user would write: load it, index it, search
    vectors = np.load(path)
    index = faiss.IndexFlatIP(vectors.shape[1])
    index.add(vectors)
    similarities, rows = index.search(queries, k)
else:                          # oddling: the bank's features mapped, searched from the map
    from oddling.index.exact import ExactCosineIndex
    distances, rows = ExactCosineIndex(np.load(path, mmap_mode="r")).search(queries, k)
seconds = time.perf_counter() - start
print(json.dumps({"seconds": seconds, **status()}))
"""

CHILD_FIT = r"""
import json, sys, time, warnings
import oddling
warnings.simplefilter("ignore")
folder, bank = sys.argv[1], sys.argv[2]
start = time.perf_counter()
oddling.fit(folder, bank, representation="pixels:16",
            options=oddling.RunOptions(use_cache=False, progress=False))
seconds = time.perf_counter() - start
status = {}
with open("/proc/self/status") as f:
    for line in f:
        key, _, value = line.partition(":")
        if key in ("VmHWM", "RssAnon"):
            status[key] = int(value.split()[0]) / 1024
print(json.dumps({"seconds": seconds, **status}))
"""


def child(code: str, *args) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(Path(__file__).parents[1] / "src"), env.get("PYTHONPATH"))
                                        if p)
    done = subprocess.run([sys.executable, "-c", code, *map(str, args)], capture_output=True, text=True, env=env)
    if done.returncode != 0:
        raise SystemExit(f"child failed: {done.stderr[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def write_bank(path: Path, gen: ClusteredBank, n: int, dtype=np.float32) -> None:
    out = np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=(n, gen.dim))
    for part, start in enumerate(range(0, n, CHUNK)):
        out[start:start + CHUNK] = gen.chunk(min(CHUNK, n - start), 1, part)
    out.flush()
    del out


def part_a(args, say, work: Path) -> None:
    gen = ClusteredBank(args.dim, args.clusters, args.rank, args.seed)
    path, queries_path = work / "features.npy", work / "queries.npy"
    start = time.perf_counter()
    write_bank(path, gen, args.n)
    np.save(queries_path, gen.array(args.queries, 2))
    say(f"A. bank {args.n} x {args.dim} float32, {path.stat().st_size / 1e9:.2f} GB on disk, written in "
        f"{time.perf_counter() - start:.0f} s; {args.queries} queries, k={args.k}")
    base = child(CHILD_SEARCH, path, queries_path, args.k, "baseline")
    mine = child(CHILD_SEARCH, path, queries_path, args.k, "oddling")
    for name, r in (("baseline (np.load whole + faiss.IndexFlatIP)", base), ("oddling (mapped, searched in place)", mine)):
        say(f"   {name}: {r['seconds']:.1f} s; peak RSS {r['VmHWM']:.0f} MB; at the end private (RssAnon) "
            f"{r['RssAnon']:.0f} MB, file pages (RssFile) {r['RssFile']:.0f} MB")
    say(f"   private memory: oddling {mine['RssAnon']:.0f} MB vs baseline {base['RssAnon']:.0f} MB "
        f"({base['RssAnon'] / max(mine['RssAnon'], 1):.1f}x less); time {mine['seconds'] / base['seconds']:.2f}x the "
        "baseline's")
    path.unlink()


def part_b(args, say, work: Path) -> None:
    from oddling.index.exact import ExactCosineIndex

    gen = ClusteredBank(args.dim, args.clusters, args.rank, args.seed + 1)
    vectors = gen.array(args.f16_n, 1)
    queries = gen.array(args.queries, 2)
    half = vectors.astype(np.float16)
    f32 = work / "f32.npy"
    f16 = work / "f16.npy"
    np.save(f32, vectors)
    np.save(f16, half)
    (d32, _), t32 = timed(ExactCosineIndex(np.load(f32, mmap_mode="r")).search, queries, args.k)
    (d16, _), t16 = timed(ExactCosineIndex(np.load(f16, mmap_mode="r")).search, queries, args.k)
    diff = float(np.max(np.abs(d32.mean(axis=1, dtype=np.float64) - d16.mean(axis=1, dtype=np.float64))))
    say(f"B. float16 vectors, {args.f16_n} x {args.dim}, {args.queries} queries, k={args.k}: largest kNN score "
        f"difference from float32 {diff:.2e} ({'met' if diff <= 1e-3 else 'NOT MET'}: <= 1e-3); on disk "
        f"{f16.stat().st_size / 1e6:.0f} MB vs {f32.stat().st_size / 1e6:.0f} MB "
        f"({f32.stat().st_size / f16.stat().st_size:.2f}x smaller); search {t16:.1f} s vs {t32:.1f} s "
        f"({t16 / t32:.2f}x the float32 time)")
    f32.unlink()
    f16.unlink()


def timed(fn, *args):
    start = time.perf_counter()
    result = fn(*args)
    return result, time.perf_counter() - start


def small_jpegs(folder: Path, n: int, seed: int) -> None:
    from PIL import Image

    folder.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        low = rng.integers(0, 256, (6, 6, 3)).astype(np.uint8)
        image = Image.fromarray(low).resize((96, 96), Image.Resampling.BICUBIC)
        image.save(folder / f"img_{i:05d}.jpg", quality=90)


def part_c(args, say, work: Path) -> None:
    import oddling
    from oddling.detectors.knn import KNNDetector

    results = {}
    for n in args.images:
        folder = work / f"images_{n}"
        small_jpegs(folder, n, seed=n)
        results[n] = child(CHILD_FIT, folder, work / f"bank_{n}")
        r = results[n]
        say(f"C. fit on {n} JPEGs of 96x96 (pixels:16, no cache): {r['seconds']:.1f} s "
            f"({n / r['seconds']:.0f} img/s); peak RSS {r['VmHWM']:.0f} MB")
    small, large = min(args.images), max(args.images)
    say(f"   peak RSS at {large} / at {small}: {results[large]['VmHWM'] / results[small]['VmHWM']:.2f} "
        f"(1.0 = flat; the {large} x 768 float32 features themselves are {large * 768 * 4 / 1e6:.0f} MB)")
    bank = oddling.load_bank(work / f"bank_{large}")
    features = np.asarray(bank.features, dtype=np.float32)
    groups = np.array([r["sha256"] for r in bank.references])
    _, seconds = timed(KNNDetector(k=5).fit, features, groups)
    say(f"   calibration at {large} references (exact leave-one-out, k=5): {seconds:.2f} s, "
        f"{100 * seconds / results[large]['seconds']:.0f}% of the fit")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n", type=int, default=1_000_000)
    parser.add_argument("--dim", type=int, default=1280)
    parser.add_argument("--queries", type=int, default=2000)
    parser.add_argument("--k", type=int, default=5)
    parser.add_argument("--clusters", type=int, default=1000)
    parser.add_argument("--rank", type=int, default=16)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--f16-n", type=int, default=200_000)
    parser.add_argument("--images", default="5000,20000", type=lambda s: [int(v) for v in s.split(",")])
    parser.add_argument("--parts", default="a,b,c", type=lambda s: s.split(","))
    parser.add_argument("--work", type=Path, default=None, help="scratch folder [default: a temporary one]")
    parser.add_argument("--out", type=Path, default=None, help="also write the report (markdown) here")
    args = parser.parse_args()
    lines = []

    def say(text: str) -> None:
        print(text, flush=True)
        lines.append(text)

    say(f"{_dt.date.today().isoformat()}; `python benchmarks/bench_large.py {' '.join(sys.argv[1:])}`; machine: "
        f"{platform.platform()}, {os.cpu_count()} cores (load average {os.getloadavg()[0]:.1f} at start), "
        f"NumPy {np.__version__}")
    with tempfile.TemporaryDirectory(dir=args.work) as tmp:
        for part, run in (("a", part_a), ("b", part_b), ("c", part_c)):
            if part in args.parts:
                run(args, say, Path(tmp))
    say(f"load average at the end {os.getloadavg()[0]:.1f}")
    if args.out:
        args.out.write_text("# Large banks: memory and calibration\n\n```\n" + "\n".join(lines) + "\n```\n")


if __name__ == "__main__":
    main()
