"""Service throughput and latency against batch scoring in one process, measured in the same run.

    python benchmarks/bench_service.py --out benchmarks/SERVICE_RESULTS.md      # ~3 minutes on 2 cores

Generates reference and query JPEGs (640x480, ~60 KB), fits a bank (EfficientNet-Lite0 embedding,
kNN), then:
- baseline: `oddling.score` on the query folder in this process (no embedding cache), best of 2;
- the service (`oddling serve`, a subprocess on 127.0.0.1, logging to SQLite, no embedding cache)
  driven by 1, 4 and 16 concurrent clients (threads, one httpx connection each), each request
  one image as multipart `files`; every image is sent twice per level after a warm-up.
Client and server share the same cores, as they would on one machine.
"""
from __future__ import annotations

import argparse
import os
import platform
import socket
import subprocess
import sys
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

N_REFERENCES = 40
N_QUERIES = 96
LEVELS = (1, 4, 16)


def scene(rng: np.random.Generator, path: Path) -> None:
    """A textured tile with a few shapes: something for the network and the JPEG decoder to chew on."""
    w, h = 640, 480
    base = rng.integers(90, 160)
    pixels = (base + rng.normal(0, 12, (h, w, 3))).clip(0, 255).astype(np.uint8)
    image = Image.fromarray(pixels)
    draw = ImageDraw.Draw(image)
    for _ in range(int(rng.integers(3, 8))):
        x, y = int(rng.integers(0, w - 80)), int(rng.integers(0, h - 80))
        size = int(rng.integers(20, 80))
        colour = tuple(int(c) for c in rng.integers(0, 255, 3))
        draw.ellipse((x, y, x + size, y + size), fill=colour)
    image.save(path, "JPEG", quality=90)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def percentile(values, q: float) -> float:
    return float(np.percentile(np.asarray(values), q))


def drive(url: str, images: list[tuple[str, bytes]], clients: int, repeats: int) -> dict:
    import httpx

    work = [(f"{name}#{r}", data) for r in range(repeats) for name, data in images]
    lock = threading.Lock()
    latencies, errors = [], []
    index = iter(range(len(work)))

    def client(_):
        with httpx.Client(base_url=url, timeout=120) as http:
            while True:
                with lock:
                    i = next(index, None)
                if i is None:
                    return
                name, data = work[i]
                t0 = time.perf_counter()
                response = http.post("/v1/score", files=[("files", (name, data, "image/jpeg"))])
                elapsed = time.perf_counter() - t0
                with lock:
                    (latencies if response.status_code == 200 else errors).append(
                        elapsed if response.status_code == 200 else response.status_code)

    started = time.perf_counter()
    with ThreadPoolExecutor(clients) as pool:
        list(pool.map(client, range(clients)))
    wall = time.perf_counter() - started
    return {"clients": clients, "requests": len(work), "errors": len(errors), "seconds": wall,
            "throughput": len(latencies) / wall, "p50_ms": 1000 * percentile(latencies, 50),
            "p99_ms": 1000 * percentile(latencies, 99)}


def batch_counts(metrics: str) -> tuple[float, float]:
    """(images, batches) so far, from the service's oddling_batch_images histogram."""
    values = {}
    for line in metrics.splitlines():
        for key in ("oddling_batch_images_sum", "oddling_batch_images_count"):
            if line.startswith(key + " "):
                values[key] = float(line.split()[-1])
    return values.get("oddling_batch_images_sum", 0.0), values.get("oddling_batch_images_count", 0.0)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--out", type=Path, default=None, help="Markdown file for the results.")
    parser.add_argument("--batch-size", type=int, default=16, help="The service's network batch size.")
    args = parser.parse_args()

    import httpx

    import oddling

    work = Path(tempfile.mkdtemp(prefix="oddling-bench-service-"))
    os.environ.setdefault("ODDLING_CACHE_DIR", str(work / "cache"))
    rng = np.random.default_rng(0)
    ref, query = work / "ref", work / "query"
    ref.mkdir()
    query.mkdir()
    for i in range(N_REFERENCES):
        scene(rng, ref / f"r{i:03d}.jpg")
    for i in range(N_QUERIES):
        scene(rng, query / f"q{i:03d}.jpg")
    images = [(p.name, p.read_bytes()) for p in sorted(query.iterdir())]
    print(f"fitting a bank on {N_REFERENCES} references ...", file=sys.stderr)
    bank = oddling.fit(ref, work / "bench.bank", target_fpr=0.1, options=oddling.RunOptions(progress=False))

    options = oddling.RunOptions(progress=False, use_cache=False)

    def batch_run() -> float:
        t0 = time.perf_counter()
        result = oddling.score(query, bank, options=options)
        assert len(result.scored) == N_QUERIES
        return N_QUERIES / (time.perf_counter() - t0)

    batch_run()   # warm-up
    before = [batch_run(), batch_run()]
    print(f"batch: {max(before):.1f} img/s", file=sys.stderr)

    port = free_port()
    url = f"http://127.0.0.1:{port}"
    server = subprocess.Popen([sys.executable, "-m", "oddling.cli", "serve", "--bank", str(bank.path), "--port",
                               str(port), "--log", str(work / "bench.log.sqlite"), "--no-cache",
                               "--batch-size", str(args.batch_size)], stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 180
        while True:
            try:
                if httpx.get(f"{url}/v1/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline or server.poll() is not None:
                raise SystemExit("the server did not become ready")
            time.sleep(0.2)
        drive(url, images[:16], 4, 1)   # warm-up: first ONNX runs, connection set-up
        levels = []
        for clients in LEVELS:
            images_before, batches_before = batch_counts(httpx.get(f"{url}/metrics").text)
            level = drive(url, images, clients, 2)
            images_after, batches_after = batch_counts(httpx.get(f"{url}/metrics").text)
            level["mean_batch"] = (images_after - images_before) / max(1.0, batches_after - batches_before)
            levels.append(level)
            print(f"{clients:>2} clients: {level['throughput']:.1f} img/s, p50 {level['p50_ms']:.1f} ms, "
                  f"p99 {level['p99_ms']:.1f} ms, {level['errors']} errors, batches of {level['mean_batch']:.1f}",
                  file=sys.stderr)
    finally:
        server.terminate()
        server.wait(timeout=30)
    after = [batch_run(), batch_run()]
    # The machine may be shared: the baseline is the best batch run before and after the service runs.
    batch_throughput = max(before + after)
    ratio = levels[-1]["throughput"] / batch_throughput
    lines = [
        "# Service benchmark",
        "",
        f"Machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}. Command: `python benchmarks/bench_service.py --out benchmarks/SERVICE_RESULTS.md`.",
        "",
        f"{N_QUERIES} query JPEGs of 640x480 against a bank of {N_REFERENCES} (EfficientNet-Lite0 embedding, kNN k=5, "
        "ONNX Runtime). Embedding cache off on both sides. The service logs every image to SQLite; client and server "
        "share the same cores.",
        "",
        f"Baseline, `oddling.score` on the folder in one process: **{batch_throughput:.1f} images/s** (best of 2 runs "
        f"before the service runs, {', '.join(f'{v:.1f}' for v in before)}, and 2 after, "
        f"{', '.join(f'{v:.1f}' for v in after)}). Load average at the end: "
        f"{', '.join(f'{v:.1f}' for v in os.getloadavg())} (a shared machine makes every figure noisy; the ratios "
        "come from the same minutes).",
        "",
        "| concurrent clients | requests | errors | images/s | share of batch | p50 latency | p99 latency | "
        "mean network batch |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for level in levels:
        lines.append(f"| {level['clients']} | {level['requests']} | {level['errors']} | {level['throughput']:.1f} | "
                     f"{level['throughput'] / batch_throughput:.0%} | {level['p50_ms']:.1f} ms | {level['p99_ms']:.1f} ms "
                     f"| {level['mean_batch']:.1f} |")
    lines += [
        "",
        f"Service batch size {args.batch_size}; single-image requests (multipart `files`).",
        "",
        f"Target: 16-client throughput >= 70% of batch throughput: **{ratio:.0%} — "
        f"{'met' if ratio >= 0.7 else 'not met'}**.",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    if args.out is not None:
        args.out.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
