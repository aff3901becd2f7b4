"""serve: a bank behind an HTTP API (FastAPI on uvicorn), scoring images as they are sent.

One worker thread owns the representation (the network) and the detector. Request handlers decode
and check their images in the server's thread pool (the same intake, pixel guard and statuses as
`oddling score`), then queue them; the worker gathers whatever is queued, and for a few
milliseconds whatever is still being decoded, into one network batch (micro-batching), scores it,
appends the rows to the log in one transaction and answers every request of the batch. The queue
is bounded: when it is full a request gets 503 with Retry-After instead of waiting without end.
"""
import asyncio
import concurrent.futures
import hashlib
import hmac
import ipaddress
import math
import os
import queue
import shutil
import sys
import tempfile
import threading
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from oddling.data.intake import IMAGE_SUFFIXES, MAX_PIXELS_DEFAULT, ORIGINAL_SIZE, IntakeError, check_type, load_rgb
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError

API_PREFIX = "/v1"
MAX_NAME_CHARS = 512
# Content types an upload may declare, and the suffix intake then judges it by.
CONTENT_TYPES = {"image/jpeg": ".jpg", "image/jpg": ".jpg", "image/pjpeg": ".jpg", "image/png": ".png",
                 "image/bmp": ".bmp", "image/x-ms-bmp": ".bmp", "image/tiff": ".tiff", "image/webp": ".webp",
                 "image/gif": ".gif"}
LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
BATCH_BUCKETS = (1, 2, 4, 8, 16, 32, 64, 128)
_ENDPOINTS = ("/v1/health", "/v1/score", "/v1/score/raw", "/v1/bank", "/v1/drift", "/metrics")


@dataclass
class ServiceConfig:
    """How the service runs; every limit is checked before the work it protects."""

    batch_size: int = 16            # images per network call, at most
    max_wait_ms: float = 5.0        # how long a batch waits for requests still being decoded
    queue_size: int = 64            # requests waiting for the model; beyond it: 503 + Retry-After
    max_body_bytes: int = 32 << 20  # per request; beyond it: 413
    max_files: int = 64             # images per request; beyond it: 413
    max_pixels: int = MAX_PIXELS_DEFAULT   # intake's decompression-bomb guard
    timeout_s: float = 30.0         # per request, queueing included; beyond it: 504
    retry_after_s: int = 1
    token: str | None = None        # bearer token; None = no authentication
    log_path: Path | None = None    # None = no log
    options: RunOptions = field(default_factory=lambda: RunOptions(progress=False))

    def check(self) -> None:
        for name in ("batch_size", "queue_size", "max_body_bytes", "max_files", "max_pixels"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise OddlingError(f"{name} must be a positive integer, got: {value!r}")
        for name in ("max_wait_ms", "timeout_s"):
            value = getattr(self, name)
            if not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
                raise OddlingError(f"{name} must be a number >= 0, got: {value!r}")
        if self.timeout_s <= 0:
            raise OddlingError(f"timeout_s must be > 0, got: {self.timeout_s}")
        if self.token is not None and not self.token.strip():
            raise OddlingError("the token is empty")


def is_loopback(host: str) -> bool:
    if host in ("localhost", "localhost.localdomain"):
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def read_token_file(path: str | os.PathLike) -> str:
    path = Path(path)
    try:
        token = path.read_text(encoding="utf-8").strip()
    except (OSError, UnicodeDecodeError) as exc:
        raise OddlingError(f"token file {path} cannot be read: {exc}") from exc
    if not token:
        raise OddlingError(f"token file {path} is empty")
    if any(c.isspace() for c in token) or not token.isprintable():
        raise OddlingError(f"token file {path} must hold one token on one line (no spaces)")
    return token


class ServiceError(Exception):
    """An HTTP error with a JSON body {"error": {"code", "message"}}."""

    def __init__(self, status: int, code: str, message: str, headers: dict | None = None, extra: dict | None = None):
        super().__init__(message)
        self.status, self.code, self.message = status, code, message
        self.headers, self.extra = headers or {}, extra or {}


# ---- metrics -----------------------------------------------------------------------------------

class Metrics:
    """Counters and histograms, written in the Prometheus text exposition format (version 0.0.4)."""

    def __init__(self):
        self._lock = threading.Lock()
        self.requests: dict[tuple[str, str, int], int] = {}
        self.latency: dict[str, list] = {}     # endpoint -> [bucket counts..., sum, count]
        self.batch_sizes = [0] * (len(BATCH_BUCKETS) + 2)
        self.images: dict[str, int] = {"ok": 0, "not_ok": 0}
        self.rejected_full = 0
        self.timeouts = 0

    def request(self, endpoint: str, method: str, status: int, seconds: float) -> None:
        with self._lock:
            key = (endpoint, method, status)
            self.requests[key] = self.requests.get(key, 0) + 1
            h = self.latency.setdefault(endpoint, [0] * (len(LATENCY_BUCKETS) + 2))
            _observe(h, LATENCY_BUCKETS, seconds)

    def batch(self, n_images: int, n_ok: int) -> None:
        with self._lock:
            _observe(self.batch_sizes, BATCH_BUCKETS, n_images)
            self.images["ok"] += n_ok
            self.images["not_ok"] += n_images - n_ok

    def count(self, what: str) -> None:
        with self._lock:
            setattr(self, what, getattr(self, what) + 1)

    def render(self, gauges: dict[str, tuple[str, float]]) -> str:
        out = []
        with self._lock:
            out += ["# HELP oddling_requests_total HTTP requests by endpoint, method and status code.",
                    "# TYPE oddling_requests_total counter"]
            for (endpoint, method, status), n in sorted(self.requests.items()):
                out.append(f'oddling_requests_total{{endpoint="{endpoint}",method="{method}",code="{status}"}} {n}')
            out += ["# HELP oddling_request_duration_seconds Time from request to response, by endpoint.",
                    "# TYPE oddling_request_duration_seconds histogram"]
            for endpoint, h in sorted(self.latency.items()):
                out += _histogram_lines("oddling_request_duration_seconds", f'endpoint="{endpoint}",', LATENCY_BUCKETS, h)
            out += ["# HELP oddling_batch_images Images per network batch (micro-batching).",
                    "# TYPE oddling_batch_images histogram"]
            out += _histogram_lines("oddling_batch_images", "", BATCH_BUCKETS, self.batch_sizes)
            out += ["# HELP oddling_images_total Images received, scored (ok) or not (unreadable, skipped).",
                    "# TYPE oddling_images_total counter"]
            out += [f'oddling_images_total{{result="{k}"}} {v}' for k, v in sorted(self.images.items())]
            out += ["# HELP oddling_rejected_queue_full_total Requests refused with 503 because the queue was full.",
                    "# TYPE oddling_rejected_queue_full_total counter", f"oddling_rejected_queue_full_total {self.rejected_full}",
                    "# HELP oddling_timeouts_total Requests answered 504 after the per-request timeout.",
                    "# TYPE oddling_timeouts_total counter", f"oddling_timeouts_total {self.timeouts}"]
        for name, (help_text, value) in sorted(gauges.items()):
            out += [f"# HELP {name} {help_text}", f"# TYPE {name} gauge", f"{name} {_prom_number(value)}"]
        return "\n".join(out) + "\n"


def _observe(h: list, buckets, value: float) -> None:
    for i, bound in enumerate(buckets):
        if value <= bound:
            h[i] += 1
    h[len(buckets)] += value   # sum
    h[len(buckets) + 1] += 1   # count


def _histogram_lines(name: str, labels: str, buckets, h: list) -> list[str]:
    lines = [f'{name}_bucket{{{labels}le="{_prom_number(b)}"}} {h[i]}' for i, b in enumerate(buckets)]
    lines.append(f'{name}_bucket{{{labels}le="+Inf"}} {h[len(buckets) + 1]}')
    bare = labels.rstrip(",")
    lines.append(f"{name}_sum{{{bare}}} {_prom_number(h[len(buckets)])}" if bare else
                 f"{name}_sum {_prom_number(h[len(buckets)])}")
    lines.append(f"{name}_count{{{bare}}} {h[len(buckets) + 1]}" if bare else f"{name}_count {h[len(buckets) + 1]}")
    return lines


def _prom_number(value: float) -> str:
    if isinstance(value, int):
        return str(value)
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    return repr(float(value))


# ---- the engine: decoding, the queue and the worker that owns the model ------------------------

@dataclass
class _Item:
    name: str
    status: str
    sha256: str | None = None
    array: np.ndarray | None = None      # network input, when it must be embedded
    vector: np.ndarray | None = None     # from the embedding cache
    health: np.ndarray | None = None


@dataclass
class _Job:
    items: list[_Item]
    request_id: str
    future: concurrent.futures.Future = field(default_factory=concurrent.futures.Future)


class ScoringEngine:
    """The bank, the representation, the queue and the worker thread. `start()` loads the model in
    the background; `ready` is set once it can score."""

    def __init__(self, bank, config: ServiceConfig):
        from oddling.logbook.store import bank_fingerprint

        self.bank = bank
        self.config = config
        self.fingerprint = bank_fingerprint(bank)
        self.ready = threading.Event()
        self.failure: str | None = None
        self.on_failure = None              # called with the message when loading fails
        self.metrics = Metrics()
        self.representation = None
        self.cache = None
        self.log = None
        self._queue = queue.Queue(maxsize=config.queue_size)
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._preparing = 0
        self._preparing_lock = threading.Lock()
        self._tmp = Path(tempfile.mkdtemp(prefix="oddling-serve-"))
        self._last_flush = time.monotonic()
        self.started = time.time()

    # -- lifecycle --

    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._main, name="oddling-model", daemon=True)
            self._thread.start()

    def stop(self, timeout: float = 30.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        while True:   # whatever is still queued is answered, not dropped silently
            try:
                job = self._queue.get_nowait()
            except queue.Empty:
                break
            if job.future.set_running_or_notify_cancel():
                job.future.set_exception(ServiceError(503, "shutting_down", "the service is stopping",
                                                      {"Retry-After": str(self.config.retry_after_s)}))
        if self.cache is not None:
            self.cache.flush()
        if self.log is not None:
            self.log.close()
        shutil.rmtree(self._tmp, ignore_errors=True)

    def _main(self) -> None:
        try:
            self._load()
        except Exception as exc:   # noqa: BLE001 - reported through /v1/health and on_failure
            self.failure = str(exc) if isinstance(exc, OddlingError) else f"{type(exc).__name__}: {exc}"
            print(f"Error: the model could not be loaded: {self.failure}", file=sys.stderr, flush=True)
            if self.on_failure is not None:
                self.on_failure(self.failure)
            return
        self.ready.set()
        self._loop()

    def _load(self) -> None:
        from oddling.jobs.reading import load_bank_representation
        from oddling.embedding.cache import open_cache
        from oddling.logbook.store import ScoreLog

        options = self.config.options
        self.representation = load_bank_representation(self.bank, options)
        self.cache = open_cache(self.representation, options)
        if self.config.log_path is not None:
            self.log = ScoreLog(self.config.log_path, bank_path=self.bank.path)

    # -- request side (server threads) --

    def prepare(self, uploads: list[tuple[str, str | None, bytes]]) -> list[_Item]:
        """(name, content type, bytes) per image -> items, decoded and checked as `score` does."""
        return [self._prepare_one(*upload) for upload in uploads]

    def preparing(self, delta: int) -> None:
        """Requests being decoded now: the worker waits up to max_wait_ms for them only while there are some."""
        with self._preparing_lock:
            self._preparing += delta

    def _prepare_one(self, name: str, content_type: str | None, data: bytes) -> _Item:
        from oddling.data.health import STATS, image_stats

        suffix = upload_suffix(name, content_type)
        item = _Item(name=name, status="ok")
        path = self._tmp / f"{uuid.uuid4().hex}{suffix}"
        path.write_bytes(data)
        try:
            check_type(path)
            item.sha256 = hashlib.sha256(data).hexdigest()
            hit = self.cache.get(item.sha256) if self.cache is not None else None
            if hit is not None:
                item.vector, item.health = hit
                return item
            prep = self.representation.preprocessing
            image = load_rgb(path, min_side=prep.resize_shorter, max_pixels=self.config.max_pixels)
            stats = image_stats(image, *image.info[ORIGINAL_SIZE])
            item.health = np.array([stats[s] for s in STATS])
            item.array = prep.to_array(image)
        except IntakeError as exc:
            item.status = exc.status
        finally:
            path.unlink(missing_ok=True)
        return item

    def submit(self, items: list[_Item], request_id: str) -> concurrent.futures.Future:
        """Queue a prepared request; 503 when the queue is full."""
        job = _Job(items, request_id)
        try:
            self._queue.put_nowait(job)
        except queue.Full:
            self.metrics.count("rejected_full")
            raise ServiceError(503, "queue_full", f"the service is busy ({self.config.queue_size} requests "
                               "waiting); retry later", {"Retry-After": str(self.config.retry_after_s)}) from None
        return job.future

    @property
    def queue_depth(self) -> int:
        return self._queue.qsize()

    # -- the worker --

    def _loop(self) -> None:
        cfg = self.config
        while not self._stop.is_set():
            try:
                first = self._queue.get(timeout=0.2)
            except queue.Empty:
                self._idle()
                continue
            jobs, n = [first], len(first.items)
            deadline = time.monotonic() + cfg.max_wait_ms / 1000
            while n < cfg.batch_size:
                try:
                    job = self._queue.get_nowait()
                except queue.Empty:
                    # Wait a little only when more requests are on their way (being decoded now).
                    remaining = deadline - time.monotonic()
                    if remaining <= 0 or self._preparing == 0:
                        break
                    try:
                        job = self._queue.get(timeout=min(remaining, 0.001))
                    except queue.Empty:
                        continue
                jobs.append(job)
                n += len(job.items)
            self._process(jobs)

    def _idle(self) -> None:
        # Vectors reach the cache file every 256 new ones, or after 5 s without a request.
        if self.cache is not None and time.monotonic() - self._last_flush > 5.0:
            self.cache.flush()
            self._last_flush = time.monotonic()

    def _process(self, jobs: list[_Job]) -> None:
        from oddling.data.health import STATS
        from oddling.embedding.runner import EmbeddedFiles, FileRecord
        from oddling.jobs.scoring import rows_from_embedded
        from oddling.logbook.records import log_rows

        live = [job for job in jobs if job.future.set_running_or_notify_cancel()]   # timed-out ones are dropped
        if not live:
            return
        try:
            items = [item for job in live for item in job.items]
            records, vectors, health = [], [], []
            to_embed = []
            for item in items:
                if item.status != "ok":
                    records.append(FileRecord(item.name, item.sha256, item.status))
                    continue
                records.append(FileRecord(item.name, item.sha256, "ok", len(vectors)))
                vectors.append(item.vector)
                health.append(item.health)
                if item.vector is None:
                    to_embed.append((len(vectors) - 1, item))
            size = self.config.batch_size
            for start in range(0, len(to_embed), size):
                chunk = to_embed[start:start + size]
                embedded = self.representation.embed(np.stack([item.array for _, item in chunk]))
                for (row, item), vec in zip(chunk, embedded):
                    vectors[row] = vec
                    if self.cache is not None:
                        self.cache.add(item.sha256, vec, item.health)
            dim = self.representation.embedding_dim
            features = EmbeddedFiles(
                records,
                np.stack(vectors).astype(np.float32, copy=False) if vectors else np.zeros((0, dim), np.float32),
                np.stack(health).astype(np.float64) if health else np.zeros((0, len(STATS))))
            rows, _ = rows_from_embedded(self.bank, features, None)
            self.metrics.batch(len(items), len(vectors))
            if self.log is not None:
                logged = []
                start = 0
                for job in live:
                    part = rows[start:start + len(job.items)]
                    logged += log_rows(part, source="service", bank_fp=self.fingerprint, request=job.request_id)
                    start += len(job.items)
                self.log.append(logged)
        except Exception as exc:   # noqa: BLE001 - every waiting request gets the error, the worker goes on
            error = ServiceError(500, "internal_error", f"scoring failed: {type(exc).__name__}: {exc}")
            for job in live:
                job.future.set_exception(error)
            return
        start = 0
        for job in live:
            job.future.set_result(rows[start:start + len(job.items)])
            start += len(job.items)


def upload_suffix(name: str, content_type: str | None) -> str:
    """The suffix intake judges an upload by: the file name's when it is an image suffix, else the
    declared content type's, else the name's own (so `notes.txt` is "skipped: not an image file type")."""
    suffix = Path(name).suffix.lower() if name else ""
    if suffix in IMAGE_SUFFIXES:
        return suffix
    declared = (content_type or "").split(";")[0].strip().lower()
    if declared in CONTENT_TYPES:
        return CONTENT_TYPES[declared]
    return suffix if suffix.isascii() and suffix[1:].isalnum() else ""


def row_json(row, name: str) -> dict:
    """A result as JSON: the scores CSV's fields (raw numbers, not rounded) plus the k nearest references."""
    return {
        "name": name,
        "sha256": row.sha256,
        "score": row.score,
        "p_value": row.p_value,
        "flagged": row.flagged,
        "nearest": row.nearest[0] if row.nearest else None,
        "nearest_distance": row.nearest_distances[0] if row.nearest_distances else None,
        "neighbours": [{"reference": p, "distance": d} for p, d in zip(row.nearest, row.nearest_distances)],
        "health": row.health or None,
        "status": row.status,
        "note": row.remarks or None,
    }


# ---- the app ----------------------------------------------------------------------------------

def serve_app(bank, *, log=None, token: str | None = None, config: ServiceConfig | None = None, **settings):
    """An ASGI app (FastAPI) that scores images against `bank` (a Bank or a bank folder).

    `log`: path of the scored-image log, True for the bank's default (`<bank>.log.sqlite`), None or
    False for none. `token`: bearer token every request but /v1/health must carry. Other keywords
    set ServiceConfig fields (batch_size, max_wait_ms, queue_size, max_body_bytes, max_files,
    max_pixels, timeout_s, options). The model loads in the background when the app starts;
    /v1/health answers 503 until then. Run it with uvicorn: `uvicorn.run(app, host="127.0.0.1")`.
    """
    from fastapi import FastAPI, Query, Request
    from fastapi.exceptions import RequestValidationError
    from fastapi.responses import JSONResponse, PlainTextResponse
    from starlette.exceptions import HTTPException as StarletteHTTPException

    from oddling import __version__
    from oddling.jobs.scoring import as_bank, require_flagging
    from oddling.logbook.store import default_log_path

    bank = as_bank(bank)
    require_flagging(bank, None, "serve")
    config = config or ServiceConfig()
    for key, value in settings.items():
        if not hasattr(config, key):
            raise OddlingError(f"serve_app has no setting {key!r}")
        setattr(config, key, value)
    if token is not None:
        config.token = token
    if log is True:
        if bank.path is None:
            raise OddlingError("the default log sits beside the bank folder; this bank is not saved: give a log path")
        config.log_path = default_log_path(bank.path)
    elif log not in (None, False):
        config.log_path = Path(log)
    config.check()
    if config.log_path is not None and not Path(config.log_path).parent.is_dir():
        raise OddlingError(f"folder {Path(config.log_path).parent} for the log does not exist")
    engine = ScoringEngine(bank, config)
    expected = f"Bearer {config.token}".encode("utf-8") if config.token else None

    async def lifespan(app):
        engine.start()
        try:
            yield
        finally:
            await asyncio.to_thread(engine.stop)

    app = FastAPI(title="oddling", version=__version__, lifespan=lifespan,
                  description="Score images against a bank of normal images: higher scores are more anomalous; "
                              "p-values and flags come from the bank's calibration.")
    app.state.engine = engine

    def error_response(exc: ServiceError) -> JSONResponse:
        body = {"error": {"code": exc.code, "message": exc.message}} | exc.extra
        return JSONResponse(body, status_code=exc.status, headers=exc.headers)

    @app.exception_handler(ServiceError)
    async def _service_error(request, exc: ServiceError):
        return error_response(exc)

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(request, exc):
        code = {404: "not_found", 405: "method_not_allowed"}.get(exc.status_code, "http_error")
        return JSONResponse({"error": {"code": code, "message": str(exc.detail)}}, status_code=exc.status_code,
                            headers=getattr(exc, "headers", None))

    @app.exception_handler(RequestValidationError)
    async def _validation_error(request, exc):
        problems = "; ".join(f"{'.'.join(str(p) for p in e.get('loc', ()))}: {e.get('msg')}" for e in exc.errors())
        return JSONResponse({"error": {"code": "invalid_request", "message": problems}}, status_code=422)

    @app.middleware("http")
    async def _measure(request: Request, call_next):
        started = time.perf_counter()
        status = 500
        try:
            response = await call_next(request)
            status = response.status_code
            return response
        finally:
            path = request.url.path
            engine.metrics.request(path if path in _ENDPOINTS else "other", request.method, status,
                                   time.perf_counter() - started)

    def authorise(request: Request) -> None:
        if expected is None:
            return
        given = request.headers.get("authorization", "").encode("utf-8", "replace")
        if not hmac.compare_digest(given, expected):
            raise ServiceError(401, "unauthorized", "a valid bearer token is required (Authorization: Bearer ...)",
                               {"WWW-Authenticate": 'Bearer realm="oddling"'})

    def require_ready() -> None:
        if not engine.ready.is_set():
            if engine.failure:
                raise ServiceError(503, "failed", f"the model could not be loaded: {engine.failure}")
            raise ServiceError(503, "loading", "the model is still loading; retry shortly",
                               {"Retry-After": str(config.retry_after_s)})

    async def read_body(request: Request) -> bytes:
        declared = request.headers.get("content-length")
        if declared is not None:
            try:
                too_big = int(declared) > config.max_body_bytes
            except ValueError:
                raise ServiceError(400, "bad_request", "Content-Length is not a number") from None
            if too_big:
                raise ServiceError(413, "too_large", f"the request body is {declared} bytes; the limit is "
                                   f"{config.max_body_bytes}")
        chunks, size = [], 0
        async for chunk in request.stream():
            size += len(chunk)
            if size > config.max_body_bytes:
                raise ServiceError(413, "too_large", f"the request body exceeds {config.max_body_bytes} bytes")
            chunks.append(chunk)
        return b"".join(chunks)

    async def score_uploads(uploads: list[tuple[str, str | None, bytes]]) -> JSONResponse:
        request_id = uuid.uuid4().hex[:16]
        loop = asyncio.get_running_loop()
        engine.preparing(+1)
        try:
            items = await loop.run_in_executor(None, engine.prepare, uploads)
            future = engine.submit(items, request_id)
        finally:
            engine.preparing(-1)   # after the job is queued: the worker sees it queued or still coming
        try:
            rows = await asyncio.wait_for(asyncio.wrap_future(future), config.timeout_s)
        except asyncio.TimeoutError:
            engine.metrics.count("timeouts")
            raise ServiceError(504, "timeout", f"not scored within {config.timeout_s:g} s; retry later",
                               {"Retry-After": str(config.retry_after_s)}) from None
        results = [row_json(row, name) for row, (name, _, _) in zip(rows, uploads)]
        cutoff = engine.bank.threshold().cutoff
        body = {"request_id": request_id, "bank": engine.fingerprint, "target_fpr": engine.bank.target_fpr,
                "cutoff": cutoff if math.isfinite(cutoff) else None, "results": results}
        bad = [r for r in results if r["status"] != "ok"]
        if bad:
            names = ", ".join(f"{r['name']}: {r['status']}" for r in bad[:5])
            body = {"error": {"code": "unreadable_image",
                              "message": f"{len(bad)} of {len(results)} files could not be scored ({names})"}} | body
            return JSONResponse(body, status_code=422)
        return JSONResponse(body)

    multipart_doc = {"requestBody": {"required": True, "content": {"multipart/form-data": {"schema": {
        "type": "object", "required": ["files"],
        "properties": {"files": {"type": "array", "items": {"type": "string", "format": "binary"}}}}}}}}
    raw_doc = {"requestBody": {"required": True, "content": {t: {"schema": {"type": "string", "format": "binary"}}
                                                             for t in sorted(set(CONTENT_TYPES))}}}

    @app.get(f"{API_PREFIX}/health", summary="200 once the model is loaded, 503 before")
    async def health():
        if engine.ready.is_set():
            return {"status": "ready", "bank": engine.fingerprint, "queue": engine.queue_depth,
                    "uptime_s": round(time.time() - engine.started, 3)}
        state = "failed" if engine.failure else "loading"
        return JSONResponse({"status": state, "error": engine.failure}, status_code=503,
                            headers={"Retry-After": str(config.retry_after_s)})

    @app.post(f"{API_PREFIX}/score", summary="Score one or more images (multipart field `files`), in order",
              openapi_extra=multipart_doc)
    async def score_multipart(request: Request):
        authorise(request)
        require_ready()
        content_type = request.headers.get("content-type", "")
        if not content_type.lower().startswith("multipart/form-data"):
            raise ServiceError(415, "unsupported_media_type", "send multipart/form-data with one or more `files` "
                               f"fields (or raw bytes to {API_PREFIX}/score/raw); got: {content_type or 'none'}")
        body = await read_body(request)
        uploads = await parse_multipart(request, body, config.max_files)
        return await score_uploads(uploads)

    @app.post(f"{API_PREFIX}/score/raw", summary="Score one image sent as the raw request body",
              openapi_extra=raw_doc)
    async def score_raw(request: Request, name: str | None = Query(None, max_length=MAX_NAME_CHARS,
                                                                   description="file name to report and log")):
        authorise(request)
        require_ready()
        content_type = request.headers.get("content-type", "").split(";")[0].strip().lower()
        if content_type not in CONTENT_TYPES:
            raise ServiceError(415, "unsupported_media_type", f"send the image bytes with an image content type "
                               f"({', '.join(sorted(set(CONTENT_TYPES)))}); got: {content_type or 'none'}")
        body = await read_body(request)
        return await score_uploads([(name or f"upload{CONTENT_TYPES[content_type]}", content_type, body)])

    @app.get(f"{API_PREFIX}/bank", summary="What the bank holds and how the service runs")
    async def bank_info(request: Request):
        authorise(request)
        b = engine.bank
        cutoff = b.threshold().cutoff
        return {"path": str(b.path) if b.path else None, "fingerprint": engine.fingerprint,
                "representation": b.representation.get("id"), "backbone": b.backbone.get("id"),
                "detector": {"name": b.detector.name, "params": b.detector.get_params(),
                             "score": b.detector.describe_score()},
                "n_references": b.size, "n_calibration": int(len(b.calibration_scores)),
                "calibration_method": b.calibration.get("method"), "target_fpr": b.target_fpr,
                "cutoff": cutoff if math.isfinite(cutoff) else None, "created": b.created,
                "tool_version": b.tool_version, "service_version": __version__,
                "log": str(config.log_path) if config.log_path else None,
                "limits": {"batch_size": config.batch_size, "max_wait_ms": config.max_wait_ms,
                           "queue_size": config.queue_size, "max_body_bytes": config.max_body_bytes,
                           "max_files": config.max_files, "max_pixels": config.max_pixels,
                           "timeout_s": config.timeout_s}}

    @app.get(f"{API_PREFIX}/drift", summary="Shift verdict over the last N logged images")
    async def drift(request: Request, last: int = Query(100, ge=2, le=5000),
                    permutations: int = Query(500, ge=19, le=5000)):
        from oddling.jobs.monitoring import drift_over_log

        authorise(request)
        require_ready()
        if engine.log is None:
            raise ServiceError(409, "no_log", "the service runs without a log (start it with --log)")
        try:
            return await asyncio.to_thread(drift_over_log, engine.log, engine.bank, last=last,
                                           n_permutations=permutations, options=config.options,
                                           representation=engine.representation, cache=engine.cache)
        except OddlingError as exc:
            raise ServiceError(409, "not_enough_images", str(exc)) from None

    @app.get("/metrics", summary="Prometheus text exposition: request counters, latency histogram",
             response_class=PlainTextResponse)
    async def metrics(request: Request):
        authorise(request)
        gauges = {"oddling_queue_depth": ("Requests waiting for the model.", engine.queue_depth),
                  "oddling_ready": ("1 once the model is loaded.", int(engine.ready.is_set())),
                  "oddling_queue_capacity": ("Requests the queue holds at most.", config.queue_size)}
        return PlainTextResponse(engine.metrics.render(gauges), media_type="text/plain; version=0.0.4; charset=utf-8")

    return app


async def parse_multipart(request, body: bytes, max_files: int) -> list[tuple[str, str | None, bytes]]:
    """The `files` parts of a multipart body already read (and size-checked): (name, content type, bytes)."""
    from starlette.datastructures import UploadFile
    from starlette.formparsers import MultiPartException
    from starlette.requests import Request

    sent = False

    async def receive():
        nonlocal sent
        if sent:
            return {"type": "http.disconnect"}
        sent = True
        return {"type": "http.request", "body": body, "more_body": False}

    replay = Request(request.scope, receive)
    try:
        form = await replay.form(max_files=max_files, max_fields=100)
    except MultiPartException as exc:
        text = str(exc.message if hasattr(exc, "message") else exc)
        status = 413 if "Too many files" in text else 400
        raise ServiceError(status, "too_many_files" if status == 413 else "bad_multipart",
                           f"{text} (at most {max_files} files per request)" if status == 413 else
                           f"the multipart body cannot be read: {text}") from None
    except Exception as exc:   # noqa: BLE001 - a malformed body is the client's mistake
        raise ServiceError(400, "bad_multipart", f"the multipart body cannot be read: {exc}") from None
    try:
        parts = form.getlist("files")
        if not parts:
            raise ServiceError(400, "no_files", "no `files` field in the multipart body")
        uploads = []
        for i, part in enumerate(parts):
            if not isinstance(part, UploadFile):
                raise ServiceError(400, "not_a_file", f"`files` field {i + 1} is text, not a file")
            name = (part.filename or f"file{i + 1}")[:MAX_NAME_CHARS]
            uploads.append((name, part.content_type, await part.read()))
        return uploads
    finally:
        await form.close()
