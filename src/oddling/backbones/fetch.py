"""Download a backbone's weight file into the cache folder: `oddling backbones fetch ID`.

- From the manifest's `url`; for a mirror or a test, `--url` or the environment variable
  ODDLING_WEIGHTS_URL_<ID> (the id upper-cased, every other character than A-Z and 0-9 as `_`:
  ODDLING_WEIGHTS_URL_RESNET18, ODDLING_WEIGHTS_URL_VIT_B_16) take its place. http and https only.
- Proxies: urllib's, from the usual environment variables (HTTPS_PROXY, HTTP_PROXY, NO_PROXY).
- Into `.<filename>.partial` beside the final file. A broken connection is resumed with an HTTP
  Range request (If-Range with the server's validator, so a file changed on the server starts
  over), a few times in the same run; a partial file left by an interrupted run is resumed by
  the next one.
- Then checked like an import (`weights.install_file`): SHA-256 against the manifest, a pin or
  the manifest's prefix; loaded into the architecture, every key and shape checked; only then
  renamed into place and, where the manifest has no full digest, the digest pinned. A file
  that fails is removed (partial included): nothing is pinned.
"""
from __future__ import annotations

import http.client
import json
import os
import re
import sys
import urllib.error
import urllib.request
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import urlsplit

from oddling.errors import OddlingError
from oddling.backbones.manifest import BackboneSpec
from oddling.backbones.weights import expected_cache_path, install_file, resolve_weights, staging_path

URL_ENV_PREFIX = "ODDLING_WEIGHTS_URL_"
ATTEMPTS = 3            # connections per run; each one after the first resumes where the last stopped
TIMEOUT = 60            # seconds without data before a connection counts as broken
CHUNK = 1 << 16


def url_env_var(backbone_id: str) -> str:
    return URL_ENV_PREFIX + re.sub(r"[^A-Z0-9]", "_", backbone_id.upper())


def weights_url(spec: BackboneSpec, url: str | None = None) -> str:
    """Where to download from: `url`, else $ODDLING_WEIGHTS_URL_<ID>, else the manifest's."""
    chosen = url or os.environ.get(url_env_var(spec.id)) or spec.weights.get("url")
    if not chosen:
        raise OddlingError(f"backbone {spec.id!r} has no download URL in the manifest; pass --url or set "
                           f"{url_env_var(spec.id)}, or import the file with `oddling backbones import`")
    if urlsplit(chosen).scheme not in ("http", "https") or not urlsplit(chosen).netloc:
        raise OddlingError(f"weights URL must be http:// or https://, got: {chosen!r}")
    return chosen


@dataclass(frozen=True)
class Fetched:
    path: Path
    sha256: str
    size: int
    pinned: bool           # this fetch pinned the digest (the manifest has no full one)
    downloaded: bool       # False: the file was already in the cache and verified
    resumed_from: int = 0  # bytes of an earlier partial download that were kept


def fetch_weights(spec: BackboneSpec, cache: Path, url: str | None = None, force: bool = False,
                  progress: bool = True, attempts: int = ATTEMPTS, timeout: float = TIMEOUT) -> Fetched:
    """Download, verify and install the backbone's weight file (see the module docstring).
    `force`: download even when a verified file is present, and replace a pinned digest."""
    if spec.weights["source"] != "cache_file":
        raise OddlingError(f"backbone {spec.id!r} ships its weights in a package; nothing to fetch")
    source = weights_url(spec, url)
    target = expected_cache_path(spec, cache)
    if target.is_file() and not force:
        try:
            path, sha = resolve_weights(spec, cache)
            return Fetched(path, sha, path.stat().st_size, pinned=False, downloaded=False)
        except OddlingError as exc:
            print(f"oddling: the cached file is not the right one ({exc}); downloading it again", file=sys.stderr)
    partial = staging_path(spec, cache, "partial")
    with _exclusive(partial.with_name(partial.name + ".lock"), spec):
        resumed = download(source, partial, expected_size=spec.weights.get("size"), progress=progress,
                           attempts=attempts, timeout=timeout)
        try:
            installed = install_file(spec, partial, cache, force=force,   # removes the partial if refused
                                     label=f"the file downloaded from {source}")
        finally:
            if not partial.exists():
                _info_path(partial).unlink(missing_ok=True)
    return Fetched(installed.path, installed.sha256, installed.size, installed.pinned, True, resumed)


@contextmanager
def _exclusive(lock_path: Path, spec: BackboneSpec):
    """One fetch of a backbone at a time (an advisory lock, released if the process dies)."""
    try:
        import fcntl
    except ImportError:   # Windows: no advisory locks here; the checksum still catches a mixed file
        yield
        return
    with open(lock_path, "a") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise OddlingError(f"another oddling is fetching backbone {spec.id!r} into this cache; "
                               "wait for it to finish") from None
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def _info_path(partial: Path) -> Path:
    return partial.with_name(partial.name + ".json")


def _read_info(partial: Path) -> dict:
    try:
        info = json.loads(_info_path(partial).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return info if isinstance(info, dict) else {}


def _write_info(partial: Path, info: dict) -> None:
    _info_path(partial).write_text(json.dumps(info), encoding="utf-8")


def _content_range(value: str | None) -> tuple[int | None, int | None, int | None]:
    """'bytes START-END/TOTAL' (or 'bytes */TOTAL') -> (start, end, total); None where absent."""
    match = re.fullmatch(r"\s*bytes\s+(?:(\d+)-(\d+)|\*)/(\d+|\*)\s*", value or "")
    if not match:
        return None, None, None
    start, end, total = match.groups()
    as_int = lambda v: int(v) if v is not None and v != "*" else None   # noqa: E731
    return as_int(start), as_int(end), as_int(total)


def _describe(exc: BaseException) -> str:
    reason = getattr(exc, "reason", None) or exc
    return str(reason) or type(exc).__name__


def download(url: str, partial: Path, expected_size: int | None = None, progress: bool = True,
             attempts: int = ATTEMPTS, timeout: float = TIMEOUT) -> int:
    """Download `url` into `partial`, resuming what is already there. Returns how many bytes of an
    earlier run were kept. OddlingError on an HTTP error, a size that is not the announced one,
    or a download still incomplete after `attempts` connections (the partial file is then kept)."""
    info = _read_info(partial)
    if partial.exists() and info.get("url") != url:
        partial.unlink()     # from another source (or of unknown origin): start over
    kept = partial.stat().st_size if partial.exists() else 0
    problem = None
    # A new opener per download: its ProxyHandler reads the proxy variables now (urlopen's shared
    # opener keeps those of its first use).
    opener = urllib.request.build_opener()
    for _ in range(attempts):
        offset = partial.stat().st_size if partial.exists() else 0
        try:
            response = opener.open(urllib.request.Request(url, headers=_headers(offset, info)), timeout=timeout)
        except urllib.error.HTTPError as exc:
            if _resume_refused(exc, url, partial, offset):
                return kept                      # the file was complete already
            kept, problem = 0, f"the server refused to resume at byte {offset}"
            continue
        except (urllib.error.URLError, http.client.HTTPException, OSError) as exc:
            problem = f"cannot reach {urlsplit(url).netloc}: {_describe(exc)}"
            continue
        with response:
            received = _receive(response, url, partial, offset, expected_size, progress)
        if received.restarted:
            kept = 0
        if received.retry is not None:
            problem = received.retry
            continue
        info = received.info
        size, total = partial.stat().st_size, received.total
        if total is not None and size > total:
            partial.unlink()
            _info_path(partial).unlink(missing_ok=True)
            raise OddlingError(f"{url} sent {size} bytes, more than the {total} it announced; download discarded")
        if (total is None and received.broken is None) or (total is not None and size == total):
            return kept
        problem = received.broken or f"the connection closed after {size} of {total} bytes"
    raise OddlingError(_incomplete_message(url, partial, attempts, problem))


def _headers(offset: int, info: dict) -> dict:
    headers = {"User-Agent": "oddling", "Accept-Encoding": "identity"}
    if offset:
        headers["Range"] = f"bytes={offset}-"
        if info.get("validator"):
            headers["If-Range"] = info["validator"]
    return headers


def _resume_refused(exc: urllib.error.HTTPError, url: str, partial: Path, offset: int) -> bool:
    """An HTTP error answering a request: True when a 416 says the partial file is whole already;
    False (the partial file removed) when the server cannot resume from it; any other error raises."""
    with exc:
        if exc.code == 416 and offset:   # nothing left to send from there
            if _content_range(exc.headers.get("Content-Range"))[2] == offset:
                return True
            partial.unlink()
            return False
    raise OddlingError(f"downloading {url} failed: HTTP {exc.code} {exc.reason}") from None


@dataclass
class _Received:
    info: dict | None = None
    total: int | None = None
    broken: str | None = None      # why the stream stopped early, if it did
    restarted: bool = False        # the bytes of an earlier run were dropped
    retry: str | None = None       # connect again, for this reason


def _receive(response, url: str, partial: Path, offset: int, expected_size: int | None, progress: bool) -> _Received:
    """Write what one response sends into `partial` (appending to a resume, or from the start)."""
    restarted = False
    if response.status == 206:
        start, _, total = _content_range(response.headers.get("Content-Range"))
        if start != offset:
            partial.unlink(missing_ok=True)
            return _Received(restarted=True, retry=f"the server answered a resume at byte {offset} from byte {start}")
        mode = "ab"
    else:             # the whole file: the server ignored the range, or the file changed
        restarted = bool(offset)
        offset, mode = 0, "wb"
        length = response.headers.get("Content-Length")
        total = int(length) if length and length.isdigit() else None
    if expected_size is not None and total is not None and total != int(expected_size):
        partial.unlink(missing_ok=True)
        _info_path(partial).unlink(missing_ok=True)
        raise OddlingError(f"{url} is {total} bytes, but the manifest says the file has {expected_size}; "
                           "not the right file")
    etag = response.headers.get("ETag")
    validator = etag if etag and not etag.startswith("W/") else response.headers.get("Last-Modified")
    info = {"url": url, "validator": validator, "total": total}
    _write_info(partial, info)
    broken = _stream(response, partial, mode, offset, total, progress)
    return _Received(info, total, broken, restarted)


def _incomplete_message(url: str, partial: Path, attempts: int, problem: str | None) -> str:
    size = partial.stat().st_size if partial.exists() else 0
    if not size:
        return (f"downloading {url} failed after {attempts} attempts ({problem}); check the URL, the network and "
                "the proxy variables (HTTPS_PROXY, HTTP_PROXY, NO_PROXY)")
    return (f"downloading {url} did not complete after {attempts} attempts ({problem}); {size} bytes are kept in "
            f"{partial}: run the same command again to resume")


def _stream(response, partial: Path, mode: str, offset: int, total: int | None, progress: bool) -> str | None:
    """Append the response body to `partial`; the reason if the connection broke, else None."""
    from tqdm import tqdm

    bar = tqdm(total=total, initial=offset, unit="B", unit_scale=True, unit_divisor=1024,
               desc=partial.name.removeprefix(".").removesuffix(".partial"), file=sys.stderr,
               disable=not progress, leave=False)
    broken = None
    try:
        with open(partial, mode) as out:
            while True:
                try:
                    chunk = response.read(CHUNK)
                except (http.client.HTTPException, OSError) as exc:   # reset, timeout, IncompleteRead
                    broken = f"the connection broke: {_describe(exc)}"
                    break
                if not chunk:
                    break
                out.write(chunk)
                bar.update(len(chunk))
            out.flush()
            os.fsync(out.fileno())
    finally:
        bar.close()
    return broken
