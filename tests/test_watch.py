"""The folder watcher: files dropped in are scored and logged once, only once complete; a restart
scores only what it had not; flagged files can be moved; a shifted stream raises a warning.

No timing: "complete" is driven by modification times set with os.utime (a future time for a file
still being written, a past one for a finished file) and by calling poll_once directly.
"""
from __future__ import annotations

import json
import os
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

import oddling
from oddling.jobs.watching import DUPLICATE_STATUS, Watcher
from oddling.logbook.store import ScoreLog

from conftest import write_digit


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from sklearn.datasets import load_digits

    digits = load_digits()
    root = tmp_path_factory.mktemp("watch")
    ref, pool = root / "ref", root / "pool"
    ref.mkdir()
    pool.mkdir()
    zeros = np.flatnonzero(digits.target == 0)
    for i in zeros[:12]:
        write_digit(digits.images[i], ref / f"r{i:04d}.png")
    for i in zeros[12:20]:
        write_digit(digits.images[i], pool / f"z{i:04d}.png")
    bank = oddling.fit(ref, root / "w.bank", target_fpr=0.1, options=oddling.RunOptions(progress=False))
    return {"root": root, "bank": bank, "pool": sorted(pool.iterdir())}


def settled(path: Path) -> None:
    """As if the file had been written an hour ago."""
    past = time.time() - 3600
    os.utime(path, (past, past))


def still_writing(path: Path) -> None:
    """A modification time in the future: never "settled", whatever the clock does during the test."""
    future = time.time() + 3600
    os.utime(path, (future, future))


def drop(source: Path, folder: Path, name: str | None = None) -> Path:
    target = folder / (name or source.name)
    shutil.copyfile(source, target)
    settled(target)
    return target


def noise(path: Path, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    Image.fromarray(rng.integers(0, 256, (64, 64, 3), dtype=np.uint8)).save(path)
    settled(path)
    return path


def make(data, tmp_path, **kw) -> tuple[Watcher, list[str], Path]:
    messages: list[str] = []
    log = kw.pop("log", tmp_path / "w.log.sqlite")
    incoming = tmp_path / "incoming"
    incoming.mkdir(exist_ok=True)
    watcher = Watcher(incoming, data["bank"], log=log, poll_seconds=0, echo=messages.append, **kw)
    return watcher, messages, log


def log_rows(path: Path):
    with ScoreLog(path, create=False) as log:
        return log.rows()


def test_dropped_files_are_scored_and_logged_once(data, tmp_path):
    watcher, _, log = make(data, tmp_path)
    with watcher:
        for source in data["pool"][:3]:
            drop(source, watcher.incoming)
        (watcher.incoming / "notes.txt").write_text("not an image")
        settled(watcher.incoming / "notes.txt")
        assert watcher.poll_once() == []            # first sighting: not yet known to be complete
        rows = watcher.poll_once()
        assert sorted(r.path for r in rows) == sorted([p.name for p in data["pool"][:3]] + ["notes.txt"])
        assert all(r.score is not None for r in rows if r.path != "notes.txt")
        for _ in range(3):
            assert watcher.poll_once() == []        # nothing twice
    logged = log_rows(log)
    assert sorted(r.name for r in logged) == sorted(r.path for r in rows)
    assert all(r.source == "watch" and r.path and Path(r.path).is_absolute() for r in logged)
    assert next(r for r in logged if r.name == "notes.txt").status.startswith("skipped: not an image")
    expected = {r.path: r for r in oddling.score(watcher.incoming, data["bank"],
                                                 options=oddling.RunOptions(progress=False)).rows}
    for r in logged:
        if r.score is not None:
            assert abs(r.score - expected[r.name].score) <= 1e-6


def test_half_written_file_waits_until_complete(data, tmp_path):
    watcher, _, log = make(data, tmp_path)
    content = data["pool"][0].read_bytes()
    target = watcher.incoming / "arriving.png"
    with watcher:
        target.write_bytes(content[: len(content) // 2])
        still_writing(target)
        for _ in range(4):
            assert watcher.poll_once() == []        # same size every poll, but still being written
        with open(target, "ab") as f:
            f.write(content[len(content) // 2:])
        still_writing(target)
        assert watcher.poll_once() == []            # grew: starts over
        settled(target)
        assert watcher.poll_once() == []            # changed mtime: one more poll to be sure
        rows = watcher.poll_once()
        assert [(r.path, r.status) for r in rows] == [("arriving.png", "ok")]
        assert watcher.poll_once() == []
    assert [(r.name, r.status) for r in log_rows(log)] == [("arriving.png", "ok")]


def test_restart_scores_only_what_it_had_not(data, tmp_path):
    first, _, log = make(data, tmp_path)
    with first:
        for source in data["pool"][:3]:
            drop(source, first.incoming)
        first.poll_once()
        assert len(first.poll_once()) == 3
    for source in data["pool"][3:5]:
        drop(source, first.incoming)
    drop(data["pool"][0], first.incoming, "copy-of-first.png")   # known content, new name
    second, _, _ = make(data, tmp_path)
    with second:
        second.poll_once()
        rows = second.poll_once()
        assert sorted((r.path, r.status) for r in rows) == sorted(
            [(p.name, "ok") for p in data["pool"][3:5]] + [("copy-of-first.png", DUPLICATE_STATUS)])
        assert next(r for r in rows if r.path == "copy-of-first.png").score is None
        assert second.poll_once() == []
    third, _, _ = make(data, tmp_path)   # a second restart finds nothing new at all
    with third:
        assert third.poll_once() == [] and third.poll_once() == []
    names = [r.name for r in log_rows(log)]
    assert len(names) == 6 and len(set(names)) == 6


def test_move_flagged_and_shift_warning(data, tmp_path):
    flagged_dir = tmp_path / "flagged"
    watcher, messages, log = make(data, tmp_path, move_flagged=flagged_dir, drift_every=4, drift_window=8,
                                  drift_permutations=99)
    with watcher:
        for seed in range(6):
            noise(watcher.incoming / f"noise{seed}.png", seed)
        watcher.poll_once()
        rows = watcher.poll_once()
    assert len(rows) == 6 and all(r.flagged for r in rows)
    assert sorted(p.name for p in flagged_dir.iterdir()) == [f"noise{s}.png" for s in range(6)]
    assert not any(watcher.incoming.glob("noise*.png"))
    assert all(Path(r.path).parent == flagged_dir.absolute() for r in log_rows(log))
    assert watcher.drift_results and watcher.drift_results[-1]["shift"]
    assert any(m.startswith("WARNING: SHIFT") for m in messages)


def test_watch_command_is_bounded_and_prints_a_summary(data, tmp_path):
    from oddling.cli import main

    incoming = tmp_path / "in"
    incoming.mkdir()
    for source in data["pool"][:2]:
        drop(source, incoming)
    log = tmp_path / "cli.log.sqlite"
    result = CliRunner().invoke(main, ["watch", str(incoming), "--bank", str(data["bank"].path), "--log", str(log),
                                       "--poll-seconds", "0", "--settle-seconds", "0", "--max-polls", "3", "--json"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    assert summary["n_logged"] == 2 and summary["polls"] == 3
    assert len(log_rows(log)) == 2
    again = CliRunner().invoke(main, ["watch", str(incoming), "--bank", str(data["bank"].path), "--log", str(log),
                                      "--poll-seconds", "0", "--max-polls", "2", "--json"])
    assert json.loads(again.stdout)["n_logged"] == 0
