"""The embedding cache: re-runs cost only hashing, interrupted runs resume, shared caches stay correct."""
import multiprocessing

import numpy as np
import pytest

import oddling
from oddling.backbones import Backbone


class CountingEmbed:
    """Wraps Backbone.embed to count how many images reach the network; can stop the run midway."""

    def __init__(self, monkeypatch, stop_after_batches=None):
        self.images = 0
        self.batches = 0
        original = Backbone.embed
        counter = self

        def embed(backbone_self, batch):
            if stop_after_batches is not None and counter.batches >= stop_after_batches:
                raise KeyboardInterrupt   # what Ctrl-C does mid-run
            counter.batches += 1
            counter.images += len(batch)
            return original(backbone_self, batch)

        monkeypatch.setattr(Backbone, "embed", embed)


def opts(cache, **kw):
    return oddling.RunOptions(cache_dir=cache, progress=False, batch_size=16, **kw)


@pytest.fixture()
def reference_csv(digits_folders, digits_bank, tmp_path):
    """Scores computed without any cache: what every cached run must reproduce byte for byte."""
    result = oddling.score(digits_folders["incoming"], digits_bank, options=opts(tmp_path / "none", use_cache=False))
    return result.to_csv()


def test_second_run_embeds_nothing(digits_folders, digits_bank, tmp_path, monkeypatch, reference_csv):
    cache = tmp_path / "cache"
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    counter = CountingEmbed(monkeypatch)
    again = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    assert counter.images == 0
    assert again.to_csv() == reference_csv


def test_interrupted_run_resumes_without_recomputing(digits_folders, digits_bank, tmp_path, monkeypatch,
                                                      reference_csv):
    cache = tmp_path / "cache"
    n_files = len(list(digits_folders["incoming"].iterdir()))
    CountingEmbed(monkeypatch, stop_after_batches=2)
    with pytest.raises(KeyboardInterrupt):
        oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    monkeypatch.undo()
    counter = CountingEmbed(monkeypatch)
    resumed = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    assert counter.images == n_files - 2 * 16     # the two finished batches were not recomputed
    assert resumed.to_csv() == reference_csv


def _score_in_process(args):
    incoming, bank_path, cache = args
    import oddling as o

    return o.score(incoming, bank_path, options=o.RunOptions(cache_dir=cache, progress=False, batch_size=16)).to_csv()


def test_two_processes_sharing_a_cache(digits_folders, digits_bank, tmp_path, reference_csv):
    cache = tmp_path / "shared"
    job = (str(digits_folders["incoming"]), str(digits_bank.path), str(cache))
    with multiprocessing.get_context("spawn").Pool(2) as pool:
        outputs = pool.map(_score_in_process, [job, job])
    assert outputs == [reference_csv, reference_csv]
    third = _score_in_process(job)     # and what they left behind is a valid cache
    assert third == reference_csv


def test_no_cache_leaves_no_files(digits_folders, digits_bank, tmp_path):
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(tmp_path / "c", use_cache=False))
    assert not (tmp_path / "c" / "embeddings").exists()


def test_damaged_chunk_is_ignored_and_recomputed(digits_folders, digits_bank, tmp_path, reference_csv):
    cache = tmp_path / "cache"
    oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    for chunk in (cache / "embeddings").rglob("chunk-*.npz"):
        chunk.write_bytes(b"garbage")
    with pytest.warns(oddling.OddlingWarning, match="damaged chunk") as record:   # said once, not fatal
        again = oddling.score(digits_folders["incoming"], digits_bank, options=opts(cache))
    assert len([w for w in record if issubclass(w.category, oddling.OddlingWarning)]) == 1
    assert again.to_csv() == reference_csv


def test_cache_key_depends_on_runtime_and_weights():
    from oddling.embedding.cache import cache_key

    fp = {"id": "x", "weights_sha256": "a" * 64}
    assert cache_key(fp, "onnx") != cache_key(fp, "torch")
    assert cache_key(fp, "onnx") != cache_key(dict(fp, weights_sha256="b" * 64), "onnx")
    assert np.array_equal([cache_key(fp, "onnx")], [cache_key(dict(fp), "onnx")])
