"""Embedding on a Dask cluster: shard the files to the workers, gather the results in file order.

Each shard is a contiguous run of files whose length is a multiple of the batch size, so a worker
forms exactly the batches a local run forms: the network sees the same inputs and gives the same
numbers, and the result is byte-identical to a local run without the cache. Results are keyed by
shard, so a shard Dask runs again (a retry, a lost worker's task rescheduled) replaces its result
and never adds a second one. Workers read the files by path (the folder must be on a file system
they see under the same path); the embedding cache stays on this side: files whose vectors are
cached are not sent, new vectors are saved as shards come back.

Named `cluster.py`, not `distributed.py`: a module is never named like the package it wraps.
"""
from __future__ import annotations

import math
import sys
import threading
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from tqdm import tqdm

from oddling.data.health import STATS
from oddling.data.intake import IntakeError, check_type, sha256_file
from oddling.embedding.runner import OK, EmbeddedFiles, FileRecord, default_workers, embed_files, frames_note_of
from oddling.errors import OddlingError

try:
    from distributed import WorkerPlugin
except ImportError:   # connect() says how to install it; the module still imports
    WorkerPlugin = object

CONNECT_TIMEOUT = "5s"   # a scheduler that does not answer in this time is reported, not waited for
RETRIES = 2              # per shard, for errors raised by the task (a lost worker is rescheduled by Dask itself)
SHARDS_PER_WORKER = 4    # enough shards to balance the load and to make a retry cheap
MAX_SHARD_BATCHES = 32   # at most 32 batches (1024 files at batch size 32) per task
INSTALL_HINT = "pip install 'oddling[cluster]'"


def connect(address: str):
    """A Dask client for the scheduler at `address`; OddlingError when distributed is missing or
    the scheduler does not answer."""
    try:
        import distributed
    except ImportError:
        raise OddlingError(f"--dask needs the dask.distributed package: {INSTALL_HINT}") from None
    try:
        return distributed.Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise OddlingError(f"cannot reach the Dask scheduler at {address} ({exc}); start one with `dask scheduler` "
                           "(see README, Distributed embedding on a Dask cluster)") from None


@dataclass(frozen=True)
class WorkerSetup:
    """What a worker needs to rebuild this side's representation, and what it must then match."""

    spec: object                    # RepresentationSpec
    cache_dir: str | None           # None: each worker's own default cache folder
    runtime: str
    fingerprint: dict               # this side's representation.cache_fingerprint()
    runtime_made: str               # this side's representation.runtime ("openvino", "torch", ...)
    version: str


class RepresentationPlugin(WorkerPlugin):
    """Loads the representation once per worker, on its first shard, and keeps it.

    The backbone's weights are verified when it loads and an export on its first batch (as in a
    local run); a worker whose representation differs from this side's (another oddling version,
    other weights, another runtime) raises OddlingError instead of embedding anything.
    """

    def __init__(self, setup: WorkerSetup):
        self.setup_ = setup
        self.representation_ = None
        self._lock = threading.Lock()

    def representation(self):
        with self._lock:   # several task threads on one worker load it once
            if self.representation_ is None:
                self.representation_ = _load_checked(self.setup_)
            return self.representation_

    def __getstate__(self):   # the lock and the loaded network stay on the worker
        return {"setup_": self.setup_}

    def __setstate__(self, state):
        self.setup_ = state["setup_"]
        self.representation_ = None
        self._lock = threading.Lock()


def _load_checked(setup: WorkerSetup):
    from oddling import __version__
    from oddling.backbones.representation import load_representation

    if __version__ != setup.version:
        raise OddlingError(f"this Dask worker runs oddling {__version__}, the client {setup.version}: "
                           "install the same version on every worker")
    representation = load_representation(setup.spec, setup.cache_dir, setup.runtime)
    if representation.cache_fingerprint() != setup.fingerprint or representation.runtime != setup.runtime_made:
        raise OddlingError(f"this Dask worker's {representation.id} ({representation.runtime}) differs from the "
                           f"client's ({setup.runtime_made}): install the same oddling, weights and runtimes on "
                           "every worker")
    return representation


def _embed_shard(plugin_name: str, root: str, paths: list[str], batch_size: int, workers: int | None) -> EmbeddedFiles:
    """The task: one shard through the worker's representation, the local runner unchanged."""
    from distributed import get_worker

    representation = get_worker().plugins[plugin_name].representation()
    return embed_files(Path(root), [Path(p) for p in paths], representation, batch_size=batch_size,
                       workers=workers, progress=False, cache=None)


def shard_length(n_files: int, batch_size: int, n_workers: int) -> int:
    """Files per shard: a whole number of batches, about SHARDS_PER_WORKER shards per worker."""
    n_batches = math.ceil(n_files / batch_size)
    per_shard = math.ceil(n_batches / (SHARDS_PER_WORKER * max(1, n_workers)))
    return batch_size * max(1, min(MAX_SHARD_BATCHES, per_shard))


def _check(path: Path):
    """(sha256, status) before any decoding: the runner's own first checks, for the cache lookup."""
    try:
        check_type(path)
        return sha256_file(path), OK
    except IntakeError as exc:
        return None, exc.status
    except OSError as exc:
        return None, f"unreadable: {exc.strerror or exc}"


def embed_on_cluster(address: str, root: Path, paths: list[Path], representation, *, runtime: str,
                     cache_dir=None, batch_size: int = 32, workers: int | None = None, progress: bool = True,
                     desc: str = "embedding", cache=None) -> EmbeddedFiles:
    """What `runner.embed_files` returns, computed by the workers of the Dask scheduler at `address`.

    `runtime` and `cache_dir` are what this side loaded `representation` with (RunOptions); the
    workers load the same. With a `cache` holding vectors, files are hashed here first and the
    cached ones are not sent (their batches then differ from a run without the cache, as locally).
    """
    from oddling import __version__

    if batch_size < 1:
        raise ValueError(f"batch_size must be >= 1, got: {batch_size}")
    if representation.backbone is not None and representation.backbone.precision != "fp32":
        raise OddlingError("--dask embeds in fp32 only (a reduced precision is checked per run, on one machine)")
    root = Path(root)
    slots: list = [None] * len(paths)   # per file: (record, vector, health statistics)
    bar = tqdm(total=len(paths), desc=desc, unit="img", file=sys.stderr, disable=not progress, leave=False)
    client = connect(address)   # first: an unreachable scheduler costs no work
    futures, name = [], None
    try:
        todo = list(range(len(paths)))
        if cache is not None and len(cache):
            todo = _answer_here(root, paths, cache, slots, workers, bar)
        if todo:
            setup = WorkerSetup(representation.spec, None if cache_dir is None else str(cache_dir), runtime,
                                representation.cache_fingerprint(), representation.runtime, __version__)
            # One name per run, removed at its end: the workers do not keep this run's network.
            name = f"oddling-representation-{uuid.uuid4().hex}"
            client.register_plugin(RepresentationPlugin(setup), name=name)
            n_workers = len(client.scheduler_info().get("workers", {}))
            size = shard_length(len(todo), batch_size, n_workers)
            shards = [todo[i:i + size] for i in range(0, len(todo), size)]
            futures = [client.submit(_embed_shard, name, str(root), [str(paths[i]) for i in shard], batch_size,
                                     workers, key=f"oddling-shard-{name[-8:]}-{s}", retries=RETRIES, pure=False)
                       for s, shard in enumerate(shards)]
            _gather(client, futures, {f.key: s for s, f in enumerate(futures)}, shards, slots, cache, bar)
    finally:
        for future in futures:
            future.cancel()
        if name is not None:
            try:
                client.unregister_worker_plugin(name)
            except Exception:   # a worker already gone has nothing to unload; never hide the run's own error
                pass
        client.close()
        bar.close()
        if cache is not None:
            cache.flush()   # keep the finished work, also on Ctrl-C
    return _assemble(slots, representation.embedding_dim)


def _answer_here(root: Path, paths: list[Path], cache, slots: list, workers: int | None, bar) -> list[int]:
    """Fill the slots of files that fail the first checks or are cached; the indices left to embed."""
    todo = []
    with ThreadPoolExecutor(max_workers=workers or default_workers()) as pool:
        for i, (path, (digest, status)) in enumerate(zip(paths, pool.map(_check, paths))):
            rel = path.relative_to(root).as_posix()
            hit = cache.get(digest) if status == OK else None
            if status != OK:
                slots[i] = (FileRecord(rel, digest, status), None, None)
            elif hit is not None:
                slots[i] = (FileRecord(rel, digest, OK, None, frames_note_of(path)), *hit)
            else:
                todo.append(i)
                continue
            bar.update(1)
    return todo


def _gather(client, futures, index: dict, shards: list[list[int]], slots: list, cache, bar) -> None:
    from distributed import as_completed

    for future in as_completed(futures, loop=client.loop):
        s = index[future.key]
        try:
            done: EmbeddedFiles = future.result()
        except OddlingError:
            raise
        except Exception as exc:
            raise OddlingError(f"shard {s + 1} of {len(shards)} (files {shards[s][0] + 1} to {shards[s][-1] + 1}) "
                               f"failed on the Dask cluster after {RETRIES} retries: {type(exc).__name__}: {exc}") from None
        for i, record in zip(shards[s], done.records):
            if record.row is None:
                slots[i] = (record, None, None)
                continue
            vector, stats = done.embeddings[record.row], done.health[record.row]
            slots[i] = (record, vector, stats)
            if cache is not None:
                cache.add(record.sha256, vector, stats)
        bar.update(len(shards[s]))


def _assemble(slots: list, dim: int) -> EmbeddedFiles:
    """The slots in file order, rows numbered as the local runner numbers them."""
    records, vectors, health = [], [], []
    for record, vector, stats in slots:
        if vector is not None:
            record.row = len(vectors)
            vectors.append(vector)
            health.append(stats)
        records.append(record)
    if vectors:
        return EmbeddedFiles(records, np.stack(vectors).astype(np.float32, copy=False),
                             np.stack(health).astype(np.float64))
    return EmbeddedFiles(records, np.zeros((0, dim), np.float32), np.zeros((0, len(STATS))))
