"""`oddling bench`: how fast is this machine? Decode, embed and search throughput on generated
images, and the time a run over N images would take — the question to answer before a big run."""
from __future__ import annotations

import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image

from oddling.backbones import load_backbone
from oddling.embedding.runner import _prepare, default_workers, embed_files
from oddling.index.exact import ExactCosineIndex


def make_test_jpegs(folder: Path, n: int, seed: int = 0, size: tuple[int, int] = (1152, 864)) -> list[Path]:
    """About 1-MP JPEGs with photo-like texture (smooth colour fields plus grain), ~350 KB each."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    w, h = size
    paths = []
    for i in range(n):
        low = rng.integers(0, 256, (max(1, h // 32), max(1, w // 32), 3)).astype(np.uint8)
        base = np.asarray(Image.fromarray(low).resize((w, h), Image.Resampling.BICUBIC), dtype=np.int16)
        grain = rng.integers(-17, 18, base.shape, dtype=np.int16)
        path = folder / f"img_{i:05d}.jpg"
        Image.fromarray(np.clip(base + grain, 0, 255).astype(np.uint8)).save(path, quality=90)
        paths.append(path)
    return paths


def measure(backbone_id: str, runtime: str = "auto", n_images: int = 96, bank_size: int = 10000,
            batch_size: int = 32, workers: int | None = None, cache_dir=None, log=print) -> dict:
    """Throughputs in images (or queries) per second."""
    workers = workers or default_workers()
    net = load_backbone(backbone_id, cache_dir, runtime)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        log(f"generating {n_images} test JPEGs (1152x864) ...")
        paths = make_test_jpegs(folder, n_images)
        embed_files(folder, paths[:batch_size], net, batch_size=batch_size, workers=workers, progress=False)  # warm-up

        start = time.perf_counter()
        with ThreadPoolExecutor(workers) as pool:
            arrays = [a for _, a, _, _ in pool.map(lambda p: _prepare(p, net.preprocessing), paths)]
        decode = n_images / (time.perf_counter() - start)

        batch = np.stack(arrays[:batch_size])
        start = time.perf_counter()
        rounds = max(1, n_images // batch_size)
        for _ in range(rounds):
            net.embed(batch)
        embed = rounds * batch_size / (time.perf_counter() - start)

        start = time.perf_counter()
        embed_files(folder, paths, net, batch_size=batch_size, workers=workers, progress=False)
        end_to_end = n_images / (time.perf_counter() - start)

    rng = np.random.default_rng(0)
    vectors = rng.standard_normal((bank_size, net.embedding_dim)).astype(np.float32)
    vectors /= np.linalg.norm(vectors, axis=1, keepdims=True)
    index = ExactCosineIndex(vectors)
    start = time.perf_counter()
    index.search(vectors[:1000], 5)
    search = 1000 / (time.perf_counter() - start)
    return {"backbone": backbone_id, "runtime": net.runtime, "workers": workers, "batch_size": batch_size,
            "decode_per_s": decode, "embed_per_s": embed, "end_to_end_per_s": end_to_end,
            "search_queries_per_s": search, "bank_size": bank_size}


def estimate_seconds(result: dict, n: int) -> float:
    return n / result["end_to_end_per_s"]
