"""Exact against approximate nearest-neighbour search on a large synthetic clustered bank.

    nice -n 10 python benchmarks/bench_index.py [--n 1000000] [--dim 1280] [--queries 10000]
                                                [--out benchmarks/INDEX_RESULTS.md]
    nice -n 10 python benchmarks/bench_index.py --crossover 20000,50000,100000,200000

Prints figures, never asserts timings: the machine is shared and noisy, so each speed-up is
against exact search measured in the same run.

The bank: `--clusters` clusters ("kinds of scene") of L2-normalised vectors, grouped in 20
domains so that neighbouring clusters overlap (see `ClusteredBank`). Each cluster has its own
random `--rank`-dimensional subspace in which its members vary (N(0, 0.15^2) per axis, a
displacement of norm ~0.6, times a per-cluster factor), plus isotropic noise (norm ~0.25) in all
dimensions: a low intrinsic dimension, as pretrained embeddings have, but not a trivial one.
The vectors are generated in seeded chunks, so a bank of a million needs no more memory than the
array itself (float32: 4 bytes x n x dim). Queries are fresh draws from the same clusters (new
normal images).

Main mode, one index at a time (each freed before the next):
  1. exact search of the queries (brute force, `ExactCosineIndex`): the time and the truth;
  2. for IVF and HNSW: `choose_index` (build, plus tuning nprobe / efSearch to recall@k 0.95 on
     1,000 held-out references against exact search), the search of the queries, recall@k
     (by distance, ANN-Benchmarks' definition, and as the share of the exact k rows found) and
     the speed-up over exact search; the resident memory after the build;
  3. peak RSS of the process.
Crossover mode: for each bank size, the cost of a kNN fit's search work (index + leave-one-out
calibration of min(n, 20,000) references) and of searching the queries, exact against HNSW and
IVF; `oddling.index.selection.EXACT_BELOW` comes from it.
"""
from __future__ import annotations

import argparse
import datetime as _dt
import gc
import os
import platform
import resource
import time
from pathlib import Path

import faiss
import numpy as np

from oddling.index import ExactCosineIndex, choose_index, recall_at_k
from oddling.index.base import QUERY_CHUNK

CHUNK = 65536
DOMAINS, CENTRE_SPREAD = 20, 0.8
WITHIN, NOISE = 0.15, 0.25     # per-axis spread in a cluster's subspace (norm ~0.6 at rank 16); noise norm


def unit(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


class ClusteredBank:
    """Seeded generator of the synthetic clustered vectors, chunk by chunk.

    Two levels, so that clusters overlap as classes of real embeddings do: `DOMAINS` random unit
    directions; each cluster's centre is its domain's plus a random unit direction times
    `CENTRE_SPREAD` (centres of one domain at cosine ~0.6 of each other); cluster sizes vary
    (Dirichlet(1) weights) and so do their spreads (x lognormal(0, 0.3)).
    """

    def __init__(self, dim: int, clusters: int, rank: int, seed: int = 0):
        rng = np.random.default_rng([seed, 0])
        domains = unit(rng.standard_normal((DOMAINS, dim)))
        self.centres = unit(domains[rng.integers(0, DOMAINS, clusters)]
                            + CENTRE_SPREAD * unit(rng.standard_normal((clusters, dim))))
        bases = rng.standard_normal((clusters, dim, rank)).astype(np.float32)
        self.bases = np.linalg.qr(bases)[0].transpose(0, 2, 1).astype(np.float32)   # orthonormal rows
        self.weights = rng.dirichlet(np.ones(clusters))
        self.spread = (WITHIN * rng.lognormal(0.0, 0.3, clusters)).astype(np.float32)
        self.dim, self.rank, self.seed = dim, rank, seed

    def chunk(self, n: int, stream: int, part: int) -> np.ndarray:
        rng = np.random.default_rng([self.seed, stream, part])
        labels = rng.choice(len(self.centres), size=n, p=self.weights)
        out = self.centres[labels] + (NOISE / np.sqrt(self.dim)) * rng.standard_normal((n, self.dim), dtype=np.float32)
        z = rng.standard_normal((n, self.rank), dtype=np.float32) * self.spread[labels][:, None]
        order = np.argsort(labels, kind="stable")
        bounds = np.flatnonzero(np.diff(labels[order])) + 1
        for rows in np.split(order, bounds):
            out[rows] += z[rows] @ self.bases[labels[rows[0]]]
        return unit(out)

    def array(self, n: int, stream: int) -> np.ndarray:
        out = np.empty((n, self.dim), dtype=np.float32)
        for part, start in enumerate(range(0, n, CHUNK)):
            out[start:start + CHUNK] = self.chunk(min(CHUNK, n - start), stream, part)
        return out


def rss_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def timed(fn, *args, **kwargs):
    start = time.perf_counter()
    result = fn(*args, **kwargs)
    return result, time.perf_counter() - start


def row_recall(found: np.ndarray, truth: np.ndarray) -> float:
    return float(np.mean([len(set(f) & set(t)) / truth.shape[1] for f, t in zip(found.tolist(), truth.tolist())]))


def main_run(args, say) -> None:
    gen = ClusteredBank(args.dim, args.clusters, args.rank, args.seed)
    bank, secs = timed(gen.array, args.n, 1)
    queries = gen.array(args.queries, 2)
    say(f"bank: {args.n} x {args.dim} float32 ({bank.nbytes / 1e9:.2f} GB), {args.clusters} clusters of rank "
        f"{args.rank}; generated in {secs:.0f} s; {args.queries} fresh queries; k={args.k}; RSS {rss_mb():.0f} MB")
    (exact_d, exact_rows), exact_s = timed(ExactCosineIndex(bank).search, queries, args.k)
    say(f"exact (brute force, faiss.knn): {exact_s:.1f} s for {args.queries} queries "
        f"({exact_s / args.queries * 1000:.2f} ms/query)")
    rows = []
    for kind in args.kinds:
        gc.collect()
        before = rss_mb()
        index, build_s = timed(choose_index, bank, args.k, kind, args.target)
        after = rss_mb()
        (found_d, found_rows), search_s = timed(index.search, queries, args.k)
        recall = float(recall_at_k(found_d, exact_d).mean())
        info = index.describe()
        params = ", ".join(f"{key}={info[key]}" for key in ("nlist", "nprobe", "M", "efConstruction", "efSearch")
                           if key in info)
        say(f"{kind}: build + tuning {build_s:.0f} s ({params}; recall measured at tuning {info['recall']:.4f}, "
            f"lower bound {info['recall_lower_bound']:.4f}); index memory ~{after - before:.0f} MB; search "
            f"{search_s:.2f} s ({search_s / args.queries * 1000:.3f} ms/query); recall@{args.k} on the queries "
            f"{recall:.4f} by distance, {row_recall(found_rows, exact_rows):.4f} by rows; speed-up over exact "
            f"{exact_s / search_s:.1f}x")
        rows.append((kind, build_s, search_s, recall, exact_s / search_s, params))
        del index, found_d, found_rows
    say("")
    say(f"| index | parameters | build + tuning (s) | search {args.queries} queries (s) | recall@{args.k} | "
        "speed-up over exact |")
    say("| --- | --- | --- | --- | --- | --- |")
    say(f"| exact | brute force | 0 | {exact_s:.1f} | 1.0000 | 1.0x |")
    for kind, build_s, search_s, recall, speedup, params in rows:
        say(f"| {kind} | {params} | {build_s:.0f} | {search_s:.2f} | {recall:.4f} | {speedup:.1f}x |")
    say("")
    say(f"peak RSS {peak_mb():.0f} MB")


def loo_queries(index, bank: np.ndarray, n_cal: int, k: int) -> float:
    """Seconds for the leave-one-out search of n_cal references (k + 1 neighbours, self dropped)."""
    rows = np.sort(np.random.default_rng(0).choice(len(bank), n_cal, replace=False))
    start = time.perf_counter()
    for i in range(0, n_cal, QUERY_CHUNK):
        index.search(bank[rows[i:i + QUERY_CHUNK]], k + 1)
    return time.perf_counter() - start


def crossover(args, say) -> None:
    gen = ClusteredBank(args.dim, args.clusters, args.rank, args.seed)
    queries = gen.array(args.queries, 2)
    say(f"crossover: {args.dim}-d clustered banks, {args.queries} queries, k={args.k}; fit = index build (+ tuning) "
        "+ leave-one-out search of min(n, 20000) references")
    say("")
    say(f"| n | exact fit (s) | exact search (s) | " + " | ".join(
        f"{kind} fit (s) | {kind} search (s) | {kind} recall" for kind in args.kinds) + " |")
    say("|" + " --- |" * (3 + 3 * len(args.kinds)))
    for n in args.crossover:
        bank = gen.array(n, 1)
        n_cal = min(n, 20000)
        exact = ExactCosineIndex(bank)
        (exact_d, _), exact_s = timed(exact.search, queries, args.k)
        cells = [str(n), f"{loo_queries(exact, bank, n_cal, args.k):.1f}", f"{exact_s:.2f}"]
        for kind in args.kinds:
            index, build_s = timed(choose_index, bank, args.k, kind, args.target)
            fit_s = build_s + loo_queries(index, bank, n_cal, args.k)
            (found, _), search_s = timed(index.search, queries, args.k)
            cells += [f"{fit_s:.1f}", f"{search_s:.2f}", f"{recall_at_k(found, exact_d).mean():.3f}"]
            del index
        say("| " + " | ".join(cells) + " |")
        del bank, exact
        gc.collect()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n", type=int, default=1_000_000)
    parser.add_argument("--dim", type=int, default=1280)
    parser.add_argument("--queries", type=int, default=10_000)
    parser.add_argument("--k", type=int, default=5)
    parser.add_argument("--clusters", type=int, default=1000)
    parser.add_argument("--rank", type=int, default=16)
    parser.add_argument("--target", type=float, default=0.95)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--kinds", default="ivf,hnsw", type=lambda s: s.split(","))
    parser.add_argument("--crossover", default=None, type=lambda s: [int(v) for v in s.split(",")],
                        help="comma-separated bank sizes: run the crossover measurement instead")
    parser.add_argument("--out", type=Path, default=None, help="also write the report (markdown) here")
    args = parser.parse_args()
    lines = []

    def say(text: str) -> None:
        print(text, flush=True)
        lines.append(text)

    say(f"{_dt.date.today().isoformat()}; machine: {platform.platform()}, {os.cpu_count()} cores "
        f"(load average {os.getloadavg()[0]:.1f} at start), faiss {faiss.__version__} on "
        f"{faiss.omp_get_max_threads()} threads, NumPy {np.__version__}")
    (crossover if args.crossover else main_run)(args, say)
    say(f"load average at the end {os.getloadavg()[0]:.1f}")
    if args.out:
        args.out.write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
