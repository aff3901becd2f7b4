"""Throughput, search speed and memory of oddling against plain baselines, measured in one run.

    python benchmarks/bench_throughput.py [--images 512] [--bank 20000] [--out results.md]

Prints ratios, never asserts timings: the machine is shared and noisy.
  1. end-to-end `oddling.fit` (files -> bank, no cache) vs a plain PyTorch eager loop
     (PIL open, resize, crop, single-threaded, batch 32) on the same 1-MP JPEGs;
  2. exact kNN search with faiss vs scikit-learn's brute-force NearestNeighbors at bank x 1280;
  3. peak memory (RSS) of embedding N and 4N images in fresh processes: flat means streaming;
  4. share of the compute limit: backbone FLOPs x images/s over measured fp32 GEMM FLOP/s;
  5. patch detector (`fit --detector patch-knn`): fit of 200 references and scoring, ms per image, bank MB
     (budget ~150 ms per image on 2 cores at the default coreset). `--local-only` runs just this.
"""
from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
from PIL import Image

from oddling.embedding.throughput import make_test_jpegs


def plain_eager_loop(paths: list[Path], batch: int = 32) -> float:
    """The baseline a user would write: single thread, PIL, PyTorch eager, contiguous layout."""
    from oddling.backbones import load_backbone

    net = load_backbone(runtime="torch")
    network = net.network.to(memory_format=torch.contiguous_format)
    prep = net.preprocessing
    start = time.perf_counter()
    for i in range(0, len(paths), batch):
        arrays = [prep.to_array(Image.open(p).convert("RGB")) for p in paths[i:i + batch]]
        with torch.inference_mode():
            network.features(torch.from_numpy(np.stack(arrays)))
    return len(paths) / (time.perf_counter() - start)


def oddling_fit(folder: Path, n_images: int, runtime: str = "auto") -> float:
    """End to end through the public API: `oddling.fit` on the folder, no embedding cache."""
    import oddling

    options = oddling.RunOptions(runtime=runtime, use_cache=False, progress=False)
    warm = folder.parent / "warm"
    if not warm.exists():   # one-time costs (ONNX export, thread pools) are not what we measure
        warm.mkdir()
        for p in sorted(folder.glob("*.jpg"))[:8]:
            (warm / p.name).write_bytes(p.read_bytes())
    oddling.fit(warm, None, k=5, target_fpr=0.2, options=options)
    start = time.perf_counter()
    oddling.fit(folder, None, k=5, options=options)
    return n_images / (time.perf_counter() - start)


def knn_comparison(bank_size: int, n_queries: int = 1000, k: int = 5, dim: int = 1280) -> tuple[float, float]:
    from sklearn.neighbors import NearestNeighbors

    from oddling.index.exact import ExactCosineIndex

    rng = np.random.default_rng(1)
    bank = rng.standard_normal((bank_size, dim)).astype(np.float32)
    bank /= np.linalg.norm(bank, axis=1, keepdims=True)
    queries = rng.standard_normal((n_queries, dim)).astype(np.float32)
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    start = time.perf_counter()
    ExactCosineIndex(bank).search(queries, k)
    ours = time.perf_counter() - start
    start = time.perf_counter()
    NearestNeighbors(n_neighbors=k, algorithm="brute", metric="cosine").fit(bank).kneighbors(queries)
    theirs = time.perf_counter() - start
    return ours, theirs


def gemm_flops(n: int = 2048, repeats: int = 5) -> float:
    a, b = torch.randn(n, n), torch.randn(n, n)
    a @ b
    start = time.perf_counter()
    for _ in range(repeats):
        a @ b
    return 2 * n ** 3 * repeats / (time.perf_counter() - start)


def backbone_flops() -> float:
    """Multiply-adds of convolutions and linear layers, counted by hooks, times 2."""
    from oddling.backbones import load_backbone

    net = load_backbone(runtime="torch").network
    total = [0]

    def conv_hook(module, inputs, output):
        kh, kw = module.kernel_size
        total[0] += output.numel() * (module.in_channels // module.groups) * kh * kw

    handles = [m.register_forward_hook(conv_hook) for m in net.modules() if isinstance(m, torch.nn.Conv2d)]
    with torch.inference_mode():
        net.features(torch.zeros(1, 3, 224, 224))
    for h in handles:
        h.remove()
    return 2.0 * total[0]


def child_peak_rss(folder: Path, n: int) -> float:
    """Peak RSS (MB) of a fresh process that embeds the first n images."""
    code = (
        "import resource, sys; from pathlib import Path; from oddling.backbones import load_backbone; "
        "from oddling.embedding.runner import embed_files; "
        f"folder = Path({str(folder)!r}); paths = sorted(folder.glob('*.jpg'))[:{n}]; "
        "embed_files(folder, paths, load_backbone(runtime='auto'), progress=False); "
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def local_mode(folder: Path, n_references: int = 200, n_scored: int = 100) -> tuple[float, float, dict]:
    """(fit ms/image, score ms/image, the patch detector's state) for `fit --detector patch-knn` at the default coreset."""
    import shutil

    import oddling

    paths = sorted(folder.glob("*.jpg"))
    refs, incoming = folder.parent / "local_refs", folder.parent / "local_incoming"
    for target, chosen in ((refs, paths[:n_references]), (incoming, paths[n_references:n_references + n_scored])):
        target.mkdir(exist_ok=True)
        for p in chosen:
            shutil.copy(p, target / p.name)
    options = oddling.RunOptions(runtime="torch", use_cache=False, progress=False)
    start = time.perf_counter()
    bank = oddling.fit(refs, None, detector="patch-knn", target_fpr=0.1, options=options)
    fit_ms = (time.perf_counter() - start) * 1000 / len(bank.references)
    start = time.perf_counter()
    result = oddling.score(incoming, bank, options=options)
    score_ms = (time.perf_counter() - start) * 1000 / len(result.scored)
    return fit_ms, score_ms, bank.detector.state()[0] | {"coreset_fraction": bank.detector.coreset}


def say_local(say, folder: Path) -> None:
    fit_ms, score_ms, info = local_mode(folder)
    say(f"local mode, 200 references, coreset {info['coreset_fraction']}: fit {fit_ms:.0f} ms/image, "
        f"score {score_ms:.0f} ms/image (budget ~150); bank {info['coreset_size']} of {info['n_patches']} "
        f"patches x {info['patch_dim']} = {info['size_mb']:.1f} MB")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--images", type=int, default=512)
    parser.add_argument("--bank", type=int, default=20000)
    parser.add_argument("--out", type=Path, default=None, help="also write the report (markdown) here")
    parser.add_argument("--local-only", action="store_true", help="only the local-mode section (5.)")
    args = parser.parse_args()
    lines = [f"machine: {platform.platform()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
             f"torch {torch.__version__}"]

    def say(text: str) -> None:
        print(text, flush=True)
        lines.append(text)

    with tempfile.TemporaryDirectory() as tmp, tempfile.TemporaryDirectory() as cache:
        os.environ["ODDLING_CACHE_DIR"] = cache
        folder = Path(tmp) / "jpegs"
        paths = make_test_jpegs(folder, args.images)
        size_kb = np.mean([p.stat().st_size for p in paths]) / 1024
        say(f"images: {args.images} JPEGs of 1152x864, mean {size_kb:.0f} KB")
        if args.local_only:
            say_local(say, folder)
            return

        baseline = plain_eager_loop(paths)
        say(f"plain PyTorch eager loop (single thread decode, batch 32): {baseline:.1f} img/s")
        torch_rt = oddling_fit(folder, len(paths), runtime="torch")
        say(f"oddling fit, PyTorch runtime:      {torch_rt:.1f} img/s  ({torch_rt / baseline:.2f}x baseline)")
        ours = oddling_fit(folder, len(paths), runtime="auto")
        say(f"oddling fit, default runtime (ONNX Runtime): {ours:.1f} img/s  ({ours / baseline:.2f}x baseline)")

        flops = backbone_flops()
        peak = gemm_flops()
        limit = peak / flops
        say(f"backbone: {flops / 1e9:.2f} GFLOP/image; fp32 GEMM measured {peak / 1e9:.0f} GFLOP/s "
            f"-> compute limit {limit:.0f} img/s; oddling reaches {ours / limit:.0%} of it")

        knn_ours, knn_sklearn = knn_comparison(args.bank)
        say(f"exact kNN, {args.bank} x 1280 bank, 1000 queries, k=5: faiss {knn_ours * 1000:.0f} ms, "
            f"scikit-learn brute force {knn_sklearn * 1000:.0f} ms ({knn_sklearn / knn_ours:.1f}x faster)")

        small, large = max(32, args.images // 4), args.images
        rss_small, rss_large = child_peak_rss(folder, small), child_peak_rss(folder, large)
        say(f"peak RSS embedding {small} images: {rss_small:.0f} MB; {large} images: {rss_large:.0f} MB "
            f"(ratio {rss_large / rss_small:.2f}; 1.0 = flat, streaming)")
        say_local(say, folder)

    if args.out:
        args.out.write_text("```\n" + "\n".join(lines) + "\n```\n")


if __name__ == "__main__":
    main()
