"""The HTTP service, started as a real subprocess on 127.0.0.1 and driven by httpx: same scores as
`oddling.score`, bad input answered with 4xx JSON, auth, backpressure, concurrency, a hard kill."""
from __future__ import annotations

import io
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

import oddling
from conftest import write_digit

httpx = pytest.importorskip("httpx")

START_SECONDS = 180   # the longest a server may take to load (bounded wait, never asserted on)


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from sklearn.datasets import load_digits

    digits = load_digits()
    root = tmp_path_factory.mktemp("service")
    ref, query = root / "ref", root / "query"
    ref.mkdir()
    query.mkdir()
    zeros = np.flatnonzero(digits.target == 0)
    for i in zeros[:12]:
        write_digit(digits.images[i], ref / f"r{i:04d}.png")
    for i in list(zeros[12:18]) + list(np.flatnonzero(digits.target == 7)[:4]):
        write_digit(digits.images[i], query / f"q{i:04d}.png")
    bank = oddling.fit(ref, root / "svc.bank", target_fpr=0.1, options=oddling.RunOptions(progress=False))
    images = {p.name: p.read_bytes() for p in sorted(query.iterdir())}
    return {"root": root, "bank": bank, "query": query, "images": images}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """`python -m oddling.cli serve ...` in a subprocess; waits (bounded) until /v1/health says ready."""

    def __init__(self, bank_path: Path, log: Path | None, *extra):
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log = log
        args = [sys.executable, "-m", "oddling.cli", "serve", "--bank", str(bank_path), "--port", str(self.port)]
        args += ["--log", str(log)] if log is not None else ["--no-log"]
        self.stderr = open(Path(bank_path).parent / f"server-{self.port}.err", "w+")
        self.process = subprocess.Popen(args + [str(a) for a in extra], stdout=subprocess.DEVNULL,
                                        stderr=self.stderr, env=os.environ.copy())
        deadline = time.monotonic() + START_SECONDS
        while True:
            if self.process.poll() is not None:
                raise AssertionError(f"server exited with {self.process.returncode}: {self.error_text()}")
            try:
                if httpx.get(f"{self.url}/v1/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                self.stop()
                raise AssertionError(f"server not ready within {START_SECONDS} s: {self.error_text()}")
            time.sleep(0.2)

    def error_text(self) -> str:
        self.stderr.flush()
        self.stderr.seek(0)
        return self.stderr.read()[-2000:]

    def kill(self) -> None:
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(timeout=30)

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.kill()
        self.stderr.close()


@pytest.fixture(scope="module")
def server(data):
    srv = Server(data["bank"].path, data["root"] / "main.log.sqlite", "--max-body-mb", 1, "--max-pixels", 100_000)
    yield srv
    srv.stop()


def post_files(url: str, files: list[tuple], **kw):
    """(name, bytes) or (name, bytes, content type) per file; image/png unless given."""
    parts = [("files", (f[0], f[1], f[2] if len(f) > 2 else "image/png")) for f in files]
    return httpx.post(f"{url}/v1/score", files=parts, timeout=60, **kw)


def logged(log_path: Path) -> list[tuple]:
    conn = sqlite3.connect(log_path)
    try:
        return conn.execute("SELECT name, request, status, score FROM scored ORDER BY id").fetchall()
    finally:
        conn.close()


def test_scores_equal_oddling_score(server, data):
    expected = {r.path: r for r in oddling.score(data["query"], data["bank"],
                                                 options=oddling.RunOptions(progress=False)).rows}
    names = list(data["images"])
    together = post_files(server.url, [(n, data["images"][n]) for n in names])
    assert together.status_code == 200, together.text
    results = together.json()["results"]
    assert [r["name"] for r in results] == names   # in the order sent
    one_by_one = [httpx.post(f"{server.url}/v1/score/raw", params={"name": n}, content=data["images"][n],
                             headers={"Content-Type": "image/png"}, timeout=60).json()["results"][0] for n in names]
    for result in results + one_by_one:
        want = expected[result["name"]]
        assert result["status"] == "ok"
        assert abs(result["score"] - want.score) <= 1e-6
        assert abs(result["p_value"] - want.p_value) <= 1e-9
        assert result["flagged"] == want.flagged
        assert result["nearest"] == want.nearest[0]
        assert [n["reference"] for n in result["neighbours"]] == want.nearest
        assert np.allclose([n["distance"] for n in result["neighbours"]], want.nearest_distances, atol=1e-6)
        assert result["health"] == want.health and result["sha256"] == want.sha256


def test_bad_input_is_a_4xx_json_error_and_the_server_stays_up(server, data):
    good = next(iter(data["images"].values()))
    big = io.BytesIO()
    Image.new("RGB", (400, 400), "gray").save(big, "PNG")   # 160 000 pixels > --max-pixels 100 000
    cases = {
        "not an image": post_files(server.url, [("notes.txt", b"just some text", "text/plain")]),
        "garbage": post_files(server.url, [("x.png", b"\x89PNG but not really" * 10)]),
        "truncated": post_files(server.url, [("t.png", good[: len(good) // 2])]),
        "empty": post_files(server.url, [("e.png", b"")]),
        "too many pixels": post_files(server.url, [("big.png", big.getvalue())]),
        "raw, wrong content type": httpx.post(f"{server.url}/v1/score/raw", content=good,
                                              headers={"Content-Type": "text/plain"}),
        "multipart expected": httpx.post(f"{server.url}/v1/score", content=good, headers={"Content-Type": "image/png"}),
        "no files field": httpx.post(f"{server.url}/v1/score", files=[("other", ("a.png", good, "image/png"))]),
        "broken multipart": httpx.post(f"{server.url}/v1/score", content=b"--xyz\r\nnonsense",
                                       headers={"Content-Type": "multipart/form-data; boundary=xyz"}),
        "body too large": post_files(server.url, [("huge.png", b"\0" * (1 << 20) + b"x")]),
        "unknown path": httpx.get(f"{server.url}/v1/nothing"),
    }
    expected = {"not an image": 422, "garbage": 422, "truncated": 422, "empty": 422, "too many pixels": 422,
                "raw, wrong content type": 415, "multipart expected": 415, "no files field": 400,
                "broken multipart": 400, "body too large": 413, "unknown path": 404}
    for name, response in cases.items():
        assert response.status_code == expected[name], (name, response.text)
        assert response.headers["content-type"].startswith("application/json"), name
        assert response.json()["error"]["message"], name
    assert "not an image file type" in cases["not an image"].json()["results"][0]["status"]
    assert "truncated or corrupt" in cases["truncated"].json()["results"][0]["status"]
    assert "image too large" in cases["too many pixels"].json()["results"][0]["status"]
    # one bad file among good ones: 422, and the good ones are still scored
    mixed = post_files(server.url, [("good.png", good), ("bad.png", b"nope")])
    assert mixed.status_code == 422 and [r["status"] == "ok" for r in mixed.json()["results"]] == [True, False]
    assert httpx.get(f"{server.url}/v1/health").status_code == 200
    assert post_files(server.url, [("after.png", good)]).status_code == 200


def test_info_endpoints_metrics_and_openapi(server, data):
    post_files(server.url, [(n, b) for n, b in list(data["images"].items())[:3]])
    bank = httpx.get(f"{server.url}/v1/bank").json()
    assert bank["n_references"] == 12 and bank["detector"]["name"] == "knn" and bank["target_fpr"] == 0.1
    drift = httpx.get(f"{server.url}/v1/drift", params={"last": 10, "permutations": 99})
    assert drift.status_code == 200, drift.text
    assert set(drift.json()) >= {"shift", "mmd_p_value", "binomial_p_value", "n_rows"}
    metrics = httpx.get(f"{server.url}/metrics")
    assert metrics.status_code == 200 and metrics.headers["content-type"].startswith("text/plain")
    text = metrics.text
    assert "# TYPE oddling_requests_total counter" in text
    assert "# TYPE oddling_request_duration_seconds histogram" in text
    assert 'oddling_request_duration_seconds_bucket{endpoint="/v1/score",le="+Inf"}' in text
    assert 'oddling_requests_total{endpoint="/v1/score",method="POST",code="200"}' in text
    for line in text.splitlines():   # every sample line is "name{labels} number"
        if line and not line.startswith("#"):
            float(line.rsplit(" ", 1)[1])
    paths = httpx.get(f"{server.url}/openapi.json").json()["paths"]
    assert {"/v1/score", "/v1/score/raw", "/v1/health", "/v1/bank", "/v1/drift", "/metrics"} <= set(paths)


def test_sixteen_concurrent_clients_every_request_logged_once(server, data):
    images = list(data["images"].values())
    before = len(logged(server.log))

    def client(c: int) -> list[int]:
        codes = []
        with httpx.Client(base_url=server.url, timeout=120) as http:
            for j in range(3):
                name = f"c{c:02d}-r{j}.png"
                response = http.post("/v1/score", files=[("files", (name, images[(c + j) % len(images)], "image/png"))])
                codes.append(response.status_code)
                if response.status_code == 200:
                    assert response.json()["results"][0]["name"] == name
        return codes

    with ThreadPoolExecutor(16) as pool:
        codes = [code for result in pool.map(client, range(16)) for code in result]
    assert codes == [200] * 48
    rows = logged(server.log)[before:]
    names = [r[0] for r in rows]
    assert sorted(names) == sorted(f"c{c:02d}-r{j}.png" for c in range(16) for j in range(3))   # each exactly once
    assert len({r[1] for r in rows}) == 48   # one request id per request
    batches = httpx.get(f"{server.url}/metrics").text
    assert "oddling_batch_images_count" in batches


def test_bearer_token(data, tmp_path):
    token_file = tmp_path / "token"
    token_file.write_text("s3cret-token-value\n")
    srv = Server(data["bank"].path, None, "--token-file", token_file)
    try:
        good = next(iter(data["images"].values()))
        assert httpx.get(f"{srv.url}/v1/health").status_code == 200   # health needs no token
        for headers in ({}, {"Authorization": "Bearer wrong"}, {"Authorization": "s3cret-token-value"}):
            response = post_files(srv.url, [("a.png", good)], headers=headers)
            assert response.status_code == 401 and response.headers["www-authenticate"].startswith("Bearer")
        assert httpx.get(f"{srv.url}/metrics").status_code == 401
        ok = post_files(srv.url, [("a.png", good)], headers={"Authorization": "Bearer s3cret-token-value"})
        assert ok.status_code == 200
    finally:
        srv.stop()


def test_non_loopback_without_token_is_refused(data):
    from oddling.cli import main

    result = CliRunner().invoke(main, ["serve", "--bank", str(data["bank"].path), "--host", "0.0.0.0", "--port", "0"])
    assert result.exit_code == 2 and "without authentication" in result.stderr


def test_full_queue_answers_503_with_retry_after(data):
    srv = Server(data["bank"].path, None, "--queue-size", 1, "--batch-size", 1, "--max-wait-ms", 0)
    try:
        files = [(f"{n}", b) for n, b in data["images"].items()]
        codes = []
        for _ in range(5):   # bounded: a few bursts until the queue has overflowed at least once
            barrier = threading.Barrier(16)

            def burst(_):
                barrier.wait(timeout=30)
                response = post_files(srv.url, files)
                return response.status_code, response.headers.get("retry-after"), response.json()

            with ThreadPoolExecutor(16) as pool:
                results = list(pool.map(burst, range(16)))
            codes += [c for c, _, _ in results]
            for code, retry, body in results:
                assert code in (200, 503)
                if code == 503:
                    assert retry is not None and int(retry) >= 1 and body["error"]["code"] == "queue_full"
            if 503 in codes:
                break
        assert 503 in codes and 200 in codes
        assert httpx.get(f"{srv.url}/v1/health").status_code == 200
        assert "oddling_rejected_queue_full_total" in httpx.get(f"{srv.url}/metrics").text
    finally:
        srv.stop()


def test_kill_9_during_load_then_restart(data, tmp_path):
    log_path = tmp_path / "killed.log.sqlite"
    srv = Server(data["bank"].path, log_path)
    images = list(data["images"].values())
    stop = threading.Event()

    def client(c: int) -> None:
        with httpx.Client(base_url=srv.url, timeout=30) as http:
            for j in range(200):   # bounded; the kill ends it much sooner
                if stop.is_set():
                    return
                try:
                    http.post("/v1/score", files=[("files", (f"k{c}-{j}.png", images[j % len(images)], "image/png"))])
                except httpx.TransportError:
                    return

    threads = [threading.Thread(target=client, args=(c,)) for c in range(8)]
    for t in threads:
        t.start()
    try:
        for _ in range(600):   # until some rows are in (at most ~60 s)
            if log_path.exists() and len(logged(log_path)) >= 20:
                break
            time.sleep(0.1)
        srv.kill()
    finally:
        stop.set()
        for t in threads:
            t.join(timeout=60)
        srv.stop()
    conn = sqlite3.connect(log_path)
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert conn.execute("SELECT name FROM scored GROUP BY name HAVING COUNT(*) > 1").fetchall() == []
        n_before = conn.execute("SELECT COUNT(*) FROM scored").fetchone()[0]
    finally:
        conn.close()
    assert n_before >= 20
    again = Server(data["bank"].path, log_path)
    try:
        assert post_files(again.url, [("after-restart.png", images[0])]).status_code == 200
    finally:
        again.stop()
    conn = sqlite3.connect(log_path)
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        names = [r[0] for r in conn.execute("SELECT name FROM scored")]
    finally:
        conn.close()
    assert len(names) == n_before + 1 and len(set(names)) == len(names) and names[-1] == "after-restart.png"
