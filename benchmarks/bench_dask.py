"""`oddling fit` on one machine against the same fit through a Dask LocalCluster, in one run.

    python benchmarks/bench_dask.py [--n 256] [--workers 2] [--runtime auto] [--batch-size 32]
                                    [--rounds 2] [--out benchmarks/DASK_RESULTS.md]

Prints figures, never asserts timings. N generated JPEGs (640 x 480, photo-like texture) are
fitted without the cache (`--no-cache`, so every image is decoded and embedded) locally and
through a LocalCluster of `--workers` processes with one thread each, on the same machine. Both
are warmed up first (exports made and verified, the files in the page cache; a cluster fit
still loads the network once in every worker, as every `--dask` run does, and that is in its
time), and the rounds interleave (local, cluster, local, ...) so each ratio compares runs made
under the same load; the median wall time of each is reported with local / cluster (above 1:
the cluster is faster). The cluster's start-up is reported apart. The bank arrays of the two
fits are compared byte for byte.

On one machine the cluster uses the same cores as the local run, plus process start-up and the
transfer of vectors: expect a ratio at or below 1. The figure that matters for a real cluster
is how the wall time falls with more machines, which this script cannot measure on one.
"""
from __future__ import annotations

import argparse
import datetime
import os
import platform
import statistics
import tempfile
import time
import warnings
from pathlib import Path

import oddling
from oddling.embedding.throughput import make_test_jpegs


def bank_arrays(bank: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(bank.glob("*.npy"))}


def timed_fit(folder: Path, bank: Path, options: oddling.RunOptions, representation: str) -> float:
    start = time.perf_counter()
    oddling.fit(folder, bank, representation=representation, target_fpr=0.1, force=True, options=options)
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n", type=int, default=256, help="images to fit on")
    parser.add_argument("--workers", type=int, default=2, help="worker processes of the LocalCluster")
    parser.add_argument("--runtime", default="auto")
    parser.add_argument("--representation", default="efficientnet-lite0")
    parser.add_argument("--batch-size", type=int, default=32)
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--out", type=Path, default=None, help="also write the report (Markdown) here")
    args = parser.parse_args()
    warnings.simplefilter("ignore", oddling.OddlingWarning)   # few calibration scores: not what is measured

    from distributed import LocalCluster

    lines = [f"machine: {platform.platform()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
             f"oddling {oddling.__version__}",
             f"fit on {args.n} JPEGs 640x480, {args.representation}, runtime {args.runtime}, batch {args.batch_size}, "
             f"no cache"]
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        images, warm = tmp / "images", tmp / "warm"
        make_test_jpegs(images, args.n, size=(640, 480))
        make_test_jpegs(warm, max(2, args.batch_size), seed=1, size=(640, 480))
        start = time.perf_counter()
        cluster = LocalCluster(processes=True, n_workers=args.workers, threads_per_worker=1, dashboard_address=None)
        started = time.perf_counter() - start
        lines.append(f"LocalCluster start-up ({args.workers} processes x 1 thread): {started:.1f} s")
        try:
            local = oddling.RunOptions(runtime=args.runtime, batch_size=args.batch_size, use_cache=False, progress=False)
            remote = oddling.RunOptions(runtime=args.runtime, batch_size=args.batch_size, use_cache=False,
                                        progress=False, dask=cluster.scheduler_address)
            # Warm-up: exports made and verified, here and on every worker (a few shards per worker).
            timed_fit(warm, tmp / "warm.bank", local, args.representation)
            warm_many = tmp / "warm_many"
            make_test_jpegs(warm_many, args.batch_size * 4 * args.workers, seed=2, size=(640, 480))
            timed_fit(warm_many, tmp / "warm.bank", remote, args.representation)
            times = {"local": [], "cluster": []}
            for _ in range(args.rounds):
                times["local"].append(timed_fit(images, tmp / "local.bank", local, args.representation))
                times["cluster"].append(timed_fit(images, tmp / "cluster.bank", remote, args.representation))
        finally:
            cluster.close()
        same = bank_arrays(tmp / "local.bank") == bank_arrays(tmp / "cluster.bank")
    median = {name: statistics.median(values) for name, values in times.items()}
    for name in ("local", "cluster"):
        lines.append(f"{name:>8}: median {median[name]:.2f} s ({args.n / median[name]:.1f} img/s); rounds "
                     + ", ".join(f"{t:.2f}" for t in times[name]))
    ratios = ", ".join(f"{a / b:.2f}" for a, b in zip(times["local"], times["cluster"]))
    lines.append(f"local / cluster wall time: {median['local'] / median['cluster']:.2f} (per round: {ratios})")
    lines.append(f"bank arrays byte-identical: {'yes' if same else 'NO'}")
    print("\n".join(lines))
    if args.out:
        stamp = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        args.out.write_text(f"# Dask benchmark\n\nLast run: {stamp}, `python benchmarks/bench_dask.py --n {args.n} "
                            f"--workers {args.workers} --runtime {args.runtime} --batch-size {args.batch_size} "
                            f"--rounds {args.rounds}`.\n\n```\n" + "\n".join(lines) + "\n```\n")


if __name__ == "__main__":
    main()
