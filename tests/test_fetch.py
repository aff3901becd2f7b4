"""`oddling backbones fetch`: download, resume, verify, install, against a small HTTP server the
tests run on 127.0.0.1 in a thread (never any other host).

The server serves a randomly initialised ResNet-18 state dict the test writes; it can drop the
connection part-way through a file, ignore Range requests, or change the file. The manifest is
patched so that resnet18's `sha256_prefix` (or `sha256`, `size`) is the test file's, since the
real file's digest can only match the real file. Every proxy variable is cleared first, so
nothing leaves the machine; the proxy test points HTTP_PROXY at the same local server.
"""
import dataclasses
import hashlib
import http.server
import json
import re
import socket
import threading

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from oddling.backbones import load_backbone, manifest
from oddling.backbones.fetch import fetch_weights, url_env_var
from oddling.backbones.manifest import get_spec
from oddling.backbones.weights import expected_cache_path
from oddling.cli import main
from oddling.errors import OddlingError

ID = "resnet18"
PROXY_VARS = ("http_proxy", "https_proxy", "all_proxy", "no_proxy", "HTTP_PROXY", "HTTPS_PROXY", "ALL_PROXY",
              "NO_PROXY")


class Handler(http.server.BaseHTTPRequestHandler):
    """GET with single `bytes=N-` ranges, If-Range on the ETag, and the faults the tests ask for."""

    def do_GET(self):
        site = self.server.site
        path = self.path
        proxied = path.startswith("http://")
        if proxied:   # a proxy receives the absolute URL
            path = "/" + path.split("/", 3)[3]
        rng, if_range = self.headers.get("Range"), self.headers.get("If-Range")
        site.requests.append({"path": path, "range": rng, "if_range": if_range, "proxied": proxied,
                              "absolute": self.path if proxied else None})
        if path not in site.files:
            self.send_error(404, "Not Found")
            return
        data = site.files[path]
        etag = '"' + hashlib.sha256(data).hexdigest()[:16] + '"'
        start = 0
        match = re.fullmatch(r"bytes=(\d+)-", rng or "")
        if match and not site.ignore_range and (if_range is None or if_range == etag):
            start = int(match.group(1))
            if start >= len(data):
                self.send_response(416)
                self.send_header("Content-Range", f"bytes */{len(data)}")
                self.send_header("Content-Length", "0")
                self.end_headers()
                return
            self.send_response(206)
            self.send_header("Content-Range", f"bytes {start}-{len(data) - 1}/{len(data)}")
        else:
            self.send_response(200)
        self.send_header("Content-Length", str(len(data) - start))
        self.send_header("ETag", etag)
        self.end_headers()
        body = data[start:]
        if site.drops_left > 0 and site.drop_at is not None and site.drop_at > start:
            site.drops_left -= 1
            self.wfile.write(body[:site.drop_at - start])   # then the connection closes: a dropped download
            self.wfile.flush()
            self.close_connection = True
            return
        if site.per_connection is not None and len(body) > site.per_connection:
            self.wfile.write(body[:site.per_connection])    # a link that breaks after so many bytes, every time
            self.wfile.flush()
            self.close_connection = True
            return
        self.wfile.write(body)

    def log_message(self, *args):
        pass


class Site:
    def __init__(self):
        self.files: dict[str, bytes] = {}
        self.requests: list[dict] = []
        self.drop_at: int | None = None
        self.drops_left = 0
        self.ignore_range = False
        self.per_connection: int | None = None


@pytest.fixture
def server(monkeypatch):
    for name in PROXY_VARS:
        monkeypatch.delenv(name, raising=False)
    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    httpd.site = Site()
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    httpd.site.base = f"http://127.0.0.1:{httpd.server_address[1]}"
    yield httpd.site
    httpd.shutdown()
    httpd.server_close()
    thread.join()


@pytest.fixture(scope="module")
def weight_file(tmp_path_factory):
    """A seeded random ResNet-18 state dict: (bytes, SHA-256, model)."""
    import torchvision

    torch.manual_seed(0)
    model = torchvision.models.resnet18(weights=None).eval()
    path = tmp_path_factory.mktemp("served") / "resnet18.pth"
    torch.save(model.state_dict(), path)
    data = path.read_bytes()
    return data, hashlib.sha256(data).hexdigest(), model


@pytest.fixture
def patch_spec(monkeypatch):
    """Replace fields of resnet18's manifest weights for this test: patch_spec(sha256_prefix=...)."""
    shipped = manifest.load_manifest()

    def patch(**weights):
        spec = shipped[ID]
        specs = dict(shipped, **{ID: dataclasses.replace(spec, weights=dict(spec.weights, **weights))})
        monkeypatch.setattr(manifest, "load_manifest", lambda: specs)
        return specs[ID]

    return patch


@pytest.fixture
def served(server, weight_file, patch_spec):
    """The server holding the weight file, and resnet18's spec with the file's digest prefix."""
    data, sha, _ = weight_file
    server.files["/models/resnet18-test.pth"] = data
    server.url = server.base + "/models/resnet18-test.pth"
    server.spec = patch_spec(sha256_prefix=sha[:8])
    return server


def pins(cache):
    path = cache / "weights" / "pins.json"
    return json.loads(path.read_text()) if path.exists() else {}


def leftovers(cache):
    folder = cache / "weights" / ID
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".") and not p.name.endswith(".lock")) \
        if folder.exists() else []


def test_fetch_downloads_verifies_pins_and_loads(served, weight_file, tmp_path):
    data, sha, model = weight_file
    fetched = fetch_weights(served.spec, tmp_path, url=served.url, progress=False)
    assert fetched.downloaded and fetched.pinned and fetched.sha256 == sha and fetched.size == len(data)
    assert expected_cache_path(served.spec, tmp_path).read_bytes() == data
    assert pins(tmp_path)[ID]["sha256"] == sha
    assert leftovers(tmp_path) == []
    backbone = load_backbone(ID, tmp_path, runtime="torch")
    x = np.random.default_rng(0).standard_normal((1, 3, 224, 224)).astype(np.float32)
    model_fc = torch.nn.Sequential(*list(model.children())[:-1])   # torchvision's own pooled features
    with torch.inference_mode():
        ref = torch.nn.functional.normalize(model_fc(torch.from_numpy(x)).flatten(1), dim=1).numpy()
    np.testing.assert_allclose(backbone.embed(x), ref, atol=1e-5)
    again = fetch_weights(served.spec, tmp_path, url=served.url, progress=False)
    assert not again.downloaded and len(served.requests) == 1   # present and verified: no second download


def test_dropped_connection_is_resumed_with_a_range_request(served, weight_file, tmp_path):
    data, sha, _ = weight_file
    served.drop_at, served.drops_left = len(data) // 3, 1
    fetched = fetch_weights(served.spec, tmp_path, url=served.url, progress=False)
    assert fetched.sha256 == sha
    first, second = served.requests
    assert first["range"] is None
    assert second["range"] == f"bytes={len(data) // 3}-" and second["if_range"]   # resumed, not restarted
    assert expected_cache_path(served.spec, tmp_path).read_bytes() == data


def test_interrupted_run_keeps_the_partial_file_and_the_next_run_resumes(served, weight_file, tmp_path):
    data, sha, _ = weight_file
    third = len(data) // 3
    served.per_connection = third     # every connection breaks after a third of the file
    with pytest.raises(OddlingError, match="did not complete after 2 attempts.*run the same command again"):
        fetch_weights(served.spec, tmp_path, url=served.url, progress=False, attempts=2)
    assert [r["range"] for r in served.requests] == [None, f"bytes={third}-"]
    partial = expected_cache_path(served.spec, tmp_path).with_name(".resnet18-f37072fd.pth.partial")
    assert partial.stat().st_size == 2 * third
    assert not expected_cache_path(served.spec, tmp_path).exists() and pins(tmp_path) == {}
    served.per_connection, served.requests[:] = None, []
    fetched = fetch_weights(served.spec, tmp_path, url=served.url, progress=False)
    assert fetched.resumed_from == 2 * third and fetched.sha256 == sha
    assert [r["range"] for r in served.requests] == [f"bytes={2 * third}-"]
    assert leftovers(tmp_path) == []


def test_a_file_changed_on_the_server_starts_over(served, weight_file, tmp_path, patch_spec):
    data, _, _ = weight_file
    served.drop_at, served.drops_left = 1000, 1
    with pytest.raises(OddlingError, match="did not complete"):
        fetch_weights(served.spec, tmp_path, url=served.url, progress=False, attempts=1)
    torch.manual_seed(7)
    import torchvision

    new = tmp_path / "new.pth"
    torch.save(torchvision.models.resnet18(weights=None).state_dict(), new)
    served.files["/models/resnet18-test.pth"] = new.read_bytes()      # new ETag: If-Range fails, 200 follows
    spec = patch_spec(sha256_prefix=hashlib.sha256(new.read_bytes()).hexdigest()[:8])
    fetched = fetch_weights(spec, tmp_path, url=served.url, progress=False)
    assert fetched.resumed_from == 0
    assert expected_cache_path(spec, tmp_path).read_bytes() == new.read_bytes()


def test_a_server_that_ignores_ranges_is_downloaded_again_from_the_start(served, weight_file, tmp_path):
    data, sha, _ = weight_file
    served.drop_at, served.drops_left, served.ignore_range = 5000, 1, True
    assert fetch_weights(served.spec, tmp_path, url=served.url, progress=False).sha256 == sha
    assert served.requests[1]["range"] == "bytes=5000-"    # asked; got the whole file with 200


def test_http_404_is_a_clear_error(served, tmp_path):
    with pytest.raises(OddlingError, match="HTTP 404"):
        fetch_weights(served.spec, tmp_path, url=served.base + "/models/nothing.pth", progress=False)
    assert not expected_cache_path(served.spec, tmp_path).exists() and pins(tmp_path) == {}


def test_wrong_checksum_is_refused_and_the_partial_file_removed(served, weight_file, tmp_path, patch_spec):
    spec = patch_spec(sha256_prefix="f37072fd")   # the shipped prefix: the real file's, not this one
    with pytest.raises(OddlingError, match=f"the file downloaded from {served.url} has SHA-256 .* does not start "
                                           "with f37072fd"):
        fetch_weights(spec, tmp_path, url=served.url, progress=False)
    assert leftovers(tmp_path) == [] and pins(tmp_path) == {}
    assert not expected_cache_path(spec, tmp_path).exists()
    spec = patch_spec(sha256="0" * 64)
    with pytest.raises(OddlingError, match="expected 0000"):
        fetch_weights(spec, tmp_path, url=served.url, progress=False)
    assert leftovers(tmp_path) == [] and pins(tmp_path) == {}


def test_a_size_other_than_the_manifests_is_refused(served, weight_file, tmp_path, patch_spec):
    data, sha, _ = weight_file
    spec = patch_spec(sha256_prefix=sha[:8], size=len(data) + 1)
    with pytest.raises(OddlingError, match=f"is {len(data)} bytes, but the manifest says the file has {len(data) + 1}"):
        fetch_weights(spec, tmp_path, url=served.url, progress=False)
    assert leftovers(tmp_path) == []


def test_a_file_that_does_not_load_is_refused_and_pins_nothing(server, patch_spec, tmp_path):
    server.files["/hello.pth"] = b"hello\n"
    spec = patch_spec(sha256_prefix=None)
    with pytest.raises(OddlingError, match="not a readable PyTorch weight file"):
        fetch_weights(spec, tmp_path, url=server.base + "/hello.pth", progress=False)
    assert pins(tmp_path) == {} and leftovers(tmp_path) == []
    assert not expected_cache_path(spec, tmp_path).exists()


def test_unreachable_server_and_bad_urls_are_clear_errors(served, tmp_path):
    with socket.socket() as s:          # a port nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with pytest.raises(OddlingError, match=f"cannot reach 127.0.0.1:{port}"):
        fetch_weights(served.spec, tmp_path, url=f"http://127.0.0.1:{port}/x.pth", progress=False, attempts=1)
    with pytest.raises(OddlingError, match="http:// or https://"):
        fetch_weights(served.spec, tmp_path, url="file:///etc/hostname", progress=False)
    with pytest.raises(OddlingError, match="ships its weights in a package"):
        fetch_weights(get_spec("efficientnet-lite0"), tmp_path, progress=False)


def test_the_proxy_from_the_environment_is_used(served, weight_file, tmp_path, monkeypatch):
    # The URL's own host (127.0.0.2, port 9) serves nothing: the file can only come through the proxy.
    monkeypatch.setenv("http_proxy", served.base)
    fetched = fetch_weights(served.spec, tmp_path, url="http://127.0.0.2:9/models/resnet18-test.pth",
                            progress=False)
    assert fetched.sha256 == weight_file[1]
    assert served.requests[0]["proxied"] and served.requests[0]["absolute"].startswith("http://127.0.0.2:9/")


def run(*args, env=None):
    return CliRunner().invoke(main, [str(a) for a in args], env=env, catch_exceptions=False)


def test_cli_fetch_list_verify(served, weight_file, tmp_path):
    data, sha, _ = weight_file
    env = {url_env_var(ID): served.url}
    assert url_env_var(ID) == "ODDLING_WEIGHTS_URL_RESNET18" and url_env_var("vit-b-16") == "ODDLING_WEIGHTS_URL_VIT_B_16"
    listed = json.loads(run("backbones", "list", "--json", "--cache-dir", tmp_path).output)["backbones"][ID]
    assert (listed["present"], listed["checksum"], listed["size"]) == (False, "prefix", None)
    result = run("backbones", "fetch", ID, "--cache-dir", tmp_path, "-q", env=env)
    assert result.exit_code == 0, result.output
    assert f"Pinned SHA-256 {sha}" in result.stderr and "the manifest has no full digest" in result.stderr
    listed = json.loads(run("backbones", "list", "--json", "--cache-dir", tmp_path).output)["backbones"][ID]
    assert (listed["present"], listed["checksum"], listed["size"]) == (True, "pinned", len(data))
    assert listed["licence"] and listed["embedding_dim"] == 512 and listed["stages"][0]["name"] == "stage1"
    text = run("backbones", "list", "--cache-dir", tmp_path).output
    assert "present (in cache, " in text and "checksum pinned" in text and "stages: stage1 (64 ch, stride 4)" in text
    result = run("backbones", "verify", ID, "--cache-dir", tmp_path)
    assert result.exit_code == 0 and f"{ID}: ok" in result.output
    target = expected_cache_path(get_spec(ID), tmp_path)
    target.write_bytes(data[:-4] + b"oops")
    result = run("backbones", "verify", "--cache-dir", tmp_path)
    assert result.exit_code == 1 and f"{ID}: FAILED" in result.output and "efficientnet-lite0: ok" in result.output
    result = run("backbones", "fetch", ID, "--cache-dir", tmp_path, "-q", env=env)   # a damaged file is replaced
    assert result.exit_code == 0 and target.read_bytes() == data


def test_cli_fetch_errors_have_no_traceback(served, tmp_path):
    result = run("backbones", "fetch", ID, "--cache-dir", tmp_path, "-q", "--url", served.base + "/missing.pth")
    assert result.exit_code == 2 and "Error: downloading" in result.stderr and "HTTP 404" in result.stderr
    assert "Traceback" not in result.output
