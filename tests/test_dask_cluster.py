"""Embedding on a Dask cluster (`--dask ADDRESS`, RunOptions(dask=...)): the outputs must be
byte-identical to a local run (the determinism contract of the design notes: "the same inputs,
bank and seed give byte-identical CSV and JSON, locally or on a Dask cluster"), also when a
worker dies mid-run. The cluster is Dask's own LocalCluster with worker processes, as its
documentation recommends for tests that need real processes."""
from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

distributed = pytest.importorskip("distributed")

import oddling  # noqa: E402
from oddling.cli import main  # noqa: E402
from oddling.embedding.cluster import shard_length  # noqa: E402
from oddling.errors import OddlingError  # noqa: E402

# Dask's notice that its default HTTP port is taken (another cluster on a shared machine): not ours.
pytestmark = pytest.mark.filterwarnings("ignore:Port 8787 is already in use")

PIXELS = "pixels:16"   # no network: fast, and its features depend on every decoded pixel
BATCH = 4              # small, so the 100 references make many shards


def start_cluster():
    return distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1, dashboard_address=None)


@pytest.fixture(scope="module")
def cluster():
    with start_cluster() as running:
        yield running


def options(address=None, **kwargs) -> oddling.RunOptions:
    # No cache on either side: a cached run leaves cached files out of its batches.
    return oddling.RunOptions(batch_size=BATCH, use_cache=False, progress=False, dask=address, **kwargs)


def arrays(bank: Path) -> dict[str, bytes]:
    names = sorted(p.name for p in bank.glob("*.npy"))
    assert "features.npy" in names and any(n.startswith("calibration") for n in names) \
        and any(n.startswith("health") for n in names), names
    return {name: (bank / name).read_bytes() for name in names}


def fit_and_score(reference: Path, incoming: Path, out: Path, representation: str, opts) -> tuple[dict, bytes]:
    bank = out / "x.bank"
    oddling.fit(reference, bank, representation=representation, target_fpr=0.1, options=opts)
    oddling.score(incoming, bank, options=opts).write_csv(out / "scores.csv")
    return arrays(bank), (out / "scores.csv").read_bytes()


@pytest.fixture(scope="module")
def incoming(digits_folders, tmp_path_factory) -> Path:
    """The digits' incoming folder plus files that get no score, so their rows travel too."""
    folder = tmp_path_factory.mktemp("incoming") / "incoming"
    shutil.copytree(digits_folders["incoming"], folder)
    (folder / "notes.txt").write_text("not an image")
    (folder / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n not really")
    return folder


@pytest.fixture(scope="module")
def local_pixels(digits_folders, incoming, tmp_path_factory):
    return fit_and_score(digits_folders["reference"], incoming, tmp_path_factory.mktemp("local"), PIXELS, options())


def test_shards_are_whole_batches():
    for n, workers in [(1, 2), (100, 2), (1000, 3), (10**6, 8)]:
        size = shard_length(n, BATCH, workers)
        assert size % BATCH == 0 and size >= BATCH


def test_a_worker_unlike_the_client_refuses_to_embed():
    from oddling.backbones.representation import load_representation
    from oddling.embedding.cluster import WorkerSetup, _load_checked

    rep = load_representation(PIXELS)
    setup = WorkerSetup(rep.spec, None, "auto", rep.cache_fingerprint(), rep.runtime, oddling.__version__)
    assert _load_checked(setup).cache_fingerprint() == rep.cache_fingerprint()
    with pytest.raises(OddlingError, match="install the same version on every worker"):
        _load_checked(WorkerSetup(rep.spec, None, "auto", rep.cache_fingerprint(), rep.runtime, "0.0.1"))
    with pytest.raises(OddlingError, match="differs from the client's"):
        _load_checked(WorkerSetup(rep.spec, None, "auto", rep.cache_fingerprint() | {"dim": 1}, rep.runtime,
                                  oddling.__version__))


def test_fit_and_score_through_the_cluster_equal_the_local_run(cluster, digits_folders, incoming, local_pixels, tmp_path):
    remote = fit_and_score(digits_folders["reference"], incoming, tmp_path, PIXELS, options(cluster.scheduler_address))
    assert remote[0] == local_pixels[0]
    assert remote[1] == local_pixels[1]
    text = remote[1].decode()
    assert "skipped: not an image file type (.txt)" in text and "broken.png" in text


def test_a_worker_killed_mid_run_still_gives_the_same_output(digits_folders, incoming, local_pixels, tmp_path):
    marker = tmp_path / "killed"

    class KillOnce(distributed.WorkerPlugin):
        """The first worker to start a shard exits at once (like a machine lost), once per test."""

        def transition(self, key, start, finish, **kwargs):
            if finish == "executing" and str(key).startswith("oddling-shard"):
                try:
                    os.close(os.open(marker, os.O_CREAT | os.O_EXCL))
                except FileExistsError:
                    return
                os._exit(1)

    with start_cluster() as fresh, distributed.Client(fresh) as client:
        client.register_plugin(KillOnce(), name="kill-once")
        remote = fit_and_score(digits_folders["reference"], incoming, tmp_path, PIXELS,
                               options(fresh.scheduler_address))
    assert marker.exists()   # a worker did die
    assert remote == local_pixels


def test_a_shard_that_keeps_failing_is_an_error_naming_it(digits_folders, tmp_path):
    import dask

    class KillAlways(distributed.WorkerPlugin):
        def transition(self, key, start, finish, **kwargs):
            if finish == "executing" and str(key).startswith("oddling-shard"):
                os._exit(1)

    # Dask's own limit on workers lost while running one task, set to 0: the first loss is final.
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with start_cluster() as fresh, distributed.Client(fresh) as client:
            client.register_plugin(KillAlways(), name="kill-always")
            with pytest.raises(OddlingError, match=r"shard \d+ of \d+ \(files \d+ to \d+\) failed on the Dask cluster"):
                oddling.fit(digits_folders["reference"], tmp_path / "x.bank", representation=PIXELS,
                            options=options(fresh.scheduler_address))
    assert not (tmp_path / "x.bank").exists()


def test_a_run_without_dask_never_imports_distributed(digits_folders, tmp_path):
    import subprocess
    import sys

    program = ("import sys, oddling\n"
               f"oddling.fit({str(digits_folders['reference'])!r}, {str(tmp_path / 'x.bank')!r}, "
               f"representation={PIXELS!r}, target_fpr=0.1, options=oddling.RunOptions(progress=False))\n"
               "print('distributed' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", program], capture_output=True, text=True, env=dict(os.environ))
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "False"


def test_the_default_network_gives_identical_bytes_on_the_cluster(cluster, digits_folders, tmp_path):
    reference, incoming = tmp_path / "reference", tmp_path / "incoming"
    reference.mkdir()
    incoming.mkdir()
    for path in sorted(digits_folders["reference"].iterdir())[:10]:
        shutil.copy(path, reference)
    for path in sorted(digits_folders["incoming"].iterdir())[:6]:
        shutil.copy(path, incoming)
    import torch

    # PyTorch's results may depend on its thread count, which earlier tests in this process can
    # change: the local run uses what each worker has (one thread).
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        local = fit_and_score(reference, incoming, tmp_path / "local", "efficientnet-lite0", options(runtime="torch"))
    finally:
        torch.set_num_threads(threads)
    remote = fit_and_score(reference, incoming, tmp_path / "remote", "efficientnet-lite0",
                           options(cluster.scheduler_address, runtime="torch"))
    assert remote == local


def test_vectors_made_on_the_cluster_serve_a_later_local_run_from_the_cache(cluster, digits_folders, tmp_path):
    cached = dict(cache_dir=tmp_path / "cache")
    remote = oddling.fit(digits_folders["reference"], tmp_path / "remote.bank", representation=PIXELS,
                         options=oddling.RunOptions(batch_size=BATCH, progress=False, dask=cluster.scheduler_address,
                                                    **cached))
    assert list((tmp_path / "cache" / "embeddings").glob("*/features.sqlite"))
    # Everything is cached now: the second cluster run sends nothing and the local run decodes nothing.
    again = oddling.fit(digits_folders["reference"], tmp_path / "again.bank", representation=PIXELS,
                        options=oddling.RunOptions(batch_size=BATCH, progress=False, dask=cluster.scheduler_address,
                                                   **cached))
    local = oddling.fit(digits_folders["reference"], tmp_path / "local.bank", representation=PIXELS,
                        options=oddling.RunOptions(batch_size=BATCH, progress=False, **cached))
    assert arrays(tmp_path / "again.bank") == arrays(tmp_path / "local.bank") == arrays(tmp_path / "remote.bank")
    assert remote.size == again.size == local.size


def run(*args, env=None):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False, env=env)


def test_the_cli_commands_take_the_scheduler_from_the_option_or_the_environment(cluster, digits_folders, tmp_path):
    common = ["--representation", PIXELS, "--target-fpr", 0.1]
    quick = ["--batch-size", BATCH, "--no-cache", "-q"]
    address = cluster.scheduler_address
    for mode, extra, env in [("local", [], None), ("option", ["--dask", address], None),
                             ("env", [], {"DASK_SCHEDULER_ADDRESS": address})]:
        out = tmp_path / mode
        bank = out / "x.bank"
        assert run("fit", digits_folders["reference"], "--bank", bank, *common, *quick, *extra, env=env).exit_code == 0
        assert run("score", digits_folders["incoming"], "--bank", bank, "--out", out / "scores.csv", *quick, *extra,
                   env=env).exit_code == 0
        assert run("evaluate", digits_folders["test"], "--bank", bank, "--out-dir", out / "eval", *quick, *extra,
                   env=env).exit_code == 0
        grown = out / "grown.bank"
        shutil.copytree(bank, grown)
        assert run("bank", "add", grown, digits_folders["test"] / "normal", *quick, *extra, env=env).exit_code == 0
    for mode in ("option", "env"):
        for name in ("scores.csv", "eval/scores.csv", "eval/metrics.json"):
            # metrics.json names the bank it used: the same up to the folder name
            made = (tmp_path / mode / name).read_bytes().replace(f"/{mode}/x.bank".encode(), b"/local/x.bank")
            assert made == (tmp_path / "local" / name).read_bytes(), (mode, name)
        for name in ("x.bank", "grown.bank"):
            assert arrays(tmp_path / mode / name) == arrays(tmp_path / "local" / name), (mode, name)


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_an_unreachable_scheduler_is_a_clear_error(digits_folders, tmp_path):
    address = f"tcp://127.0.0.1:{free_port()}"   # nothing listens there
    with pytest.raises(OddlingError, match="cannot reach the Dask scheduler"):
        oddling.fit(digits_folders["reference"], tmp_path / "x.bank", representation=PIXELS, options=options(address))
    result = run("fit", digits_folders["reference"], "--bank", tmp_path / "y.bank", "--representation", PIXELS,
                 "--dask", address, "-q")
    assert result.exit_code == 2 and "Error: cannot reach the Dask scheduler" in result.output
    assert not (tmp_path / "x.bank").exists() and not (tmp_path / "y.bank").exists()
