"""Hostile inputs: file names, file types and images made to break the writers or the decoder.

Every file still gets exactly one row with a status; nothing raises, nothing hangs, and what is
written can be read back to the real file.
"""
from __future__ import annotations

import csv
import io
import json
import os
import shutil
import subprocess
import sys

import html5lib
import numpy as np
import pytest
from PIL import Image

from oddling.bank.store import Bank
from oddling.data.intake import discover, display_path, path_from_display
from oddling.files import write_text
from oddling.data.csv_cells import path_from_cell
from oddling.reporting.results import ScoreRow, rows_to_csv

POSIX_BYTES_NAMES = os.name == "posix" and sys.getfilesystemencoding().lower() in ("utf-8", "utf8")


def _png(path, colour=(200, 40, 40), size=(48, 32)):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new("RGB", size, colour).save(path)
    return path


def _bank(ref_root, names) -> Bank:
    """A small hand-made bank (no network): enough for write_report."""
    for i, name in enumerate(names):
        _png(ref_root / name, (40 * i, 120, 200))
    n = len(names)
    from oddling.detectors.knn import KNNDetector

    features = np.eye(n, 4, dtype=np.float32)
    return Bank(
        representation={"kind": "embedding", "id": "efficientnet-lite0", "backbone": "efficientnet-lite0",
                        "preprocessing": {"crop": 224}, "dim": 4},
        detector=KNNDetector(k=1).load_state({}, {"references": features}),
        references=[{"path": name, "sha256": f"{i:064d}"} for i, name in enumerate(names)],
        features=features,
        calibration_scores=np.linspace(0.1, 0.4, 60),
        calibration={"method": "leave-one-out", "n": 60, "target_fpr": 0.05, "cutoff": 0.37},
        reference_root=str(ref_root), tool_version="0.1.0", created="2026-01-01T00:00:00+00:00",
        path=ref_root.parent / "parts.bank",
    )


def _report(tmp_path, rows, root, ref_names):
    from oddling.api import ScoreResult
    from oddling.reporting.page import write_report

    bank = _bank(tmp_path / "refs", ref_names)
    out = write_report(tmp_path / "report.html", ScoreResult(rows, bank, 0.05, 0.37, root))
    parser = html5lib.HTMLParser(tree=html5lib.getTreeBuilder("etree"), namespaceHTMLElements=False)
    doc = parser.parse(out.read_text(encoding="utf-8"))
    assert parser.errors == []
    return doc


def _cards(doc):
    return [li for li in doc.iter("li") if "card" in li.get("class", "").split()]


def _csv_rows(text: str) -> list[dict]:
    return list(csv.DictReader(io.StringIO(text, newline="")))


# --- 1. file names that are not valid UTF-8 -----------------------------------------------------

# Raw POSIX names; os.fsdecode (PEP 383 "surrogateescape") is the outside reference for what
# Python hands us, os.fsencode for getting the real bytes back.
RAW_NAMES = [b"plain.png", b"x\xff.png", b"\xe9t\xe9.png", b"caf\xc3\xa9.png", b"a\\b.png", b"x\\xff.png",
             b"\\\\x\xff\\", b"\xc3\x28.png"]


@pytest.mark.parametrize("raw", RAW_NAMES, ids=[repr(r) for r in RAW_NAMES])
def test_display_path_is_valid_utf8_and_reversible(raw):
    name = os.fsdecode(raw) if POSIX_BYTES_NAMES else raw.decode("utf-8", "surrogateescape")
    shown = display_path(name)
    shown.encode("utf-8")                       # strict: no surrogate reaches a writer
    assert path_from_display(shown) == name
    assert path_from_display(shown).encode("utf-8", "surrogateescape") == raw


def test_display_path_escapes_bytes_as_backslash_x_and_doubles_backslashes():
    assert display_path("x\udcff.png") == "x\\xff.png"
    assert display_path("x\\xff.png") == "x\\\\xff.png"      # a literal backslash-x-ff is told apart
    assert display_path("caf\u00e9/d.png") == "caf\u00e9/d.png"   # valid UTF-8 is left as it is


@pytest.mark.skipif(not POSIX_BYTES_NAMES, reason="needs a POSIX file system with byte file names")
def test_non_utf8_file_name_is_written_to_csv_and_page_and_leads_back_to_the_file(tmp_path):
    root = tmp_path / "batch"
    root.mkdir()
    try:
        _png(root / os.fsdecode(b"x\xff.png"))
    except OSError:
        pytest.skip("this file system refuses non-UTF-8 names")
    (tmp_path / "refs").mkdir()
    _png(tmp_path / "refs" / os.fsdecode(b"r\xfe.png"))
    [found] = discover(root)
    rel = found.relative_to(root).as_posix()
    rows = [ScoreRow(path=rel, status="ok", sha256="0" * 64, score=0.5, p_value=0.1, flagged=True,
                     nearest=[os.fsdecode(b"r\xfe.png")], nearest_distances=[0.4], health="ok")]

    out = write_text(tmp_path / "scores.csv", rows_to_csv(rows))       # raised UnicodeEncodeError before
    [row] = _csv_rows(out.read_text(encoding="utf-8"))
    assert row["path"] == "x\\xff.png"
    assert (root / path_from_display(row["path"])).is_file()
    assert (tmp_path / "refs" / path_from_display(row["nearest"])).is_file()

    doc = _report(tmp_path, rows, root, [os.fsdecode(b"r\xfe.png")])
    [card] = _cards(doc)
    assert card.get("data-path") == "x\\xff.png"
    assert (root / path_from_display(card.get("data-path"))).is_file()


# --- 4. line breaks in file names -----------------------------------------------------------------

LINE_BREAK_NAMES = ["cr\rname.png", "lf\nname.png", "crlf\r\nname.png", 'quote"and,comma.png']


@pytest.mark.skipif(os.name != "posix", reason="needs a file system that allows line breaks in names")
def test_line_breaks_in_file_names_stay_inside_one_quoted_csv_field(tmp_path):
    for name in LINE_BREAK_NAMES:
        _png(tmp_path / name)
    found = [p.relative_to(tmp_path).as_posix() for p in discover(tmp_path)]
    assert sorted(found) == sorted(LINE_BREAK_NAMES)
    rows = [ScoreRow(path=p, status="unreadable: x", nearest=[p]) for p in found]
    text = rows_to_csv(rows)
    # Outside reference: Python's csv module (RFC 4180 quoting) reads one record per file.
    records = list(csv.reader(io.StringIO(text, newline="")))
    assert records[0][0] == "path"
    assert [r[0] for r in records[1:]] == found
    assert [r[4] for r in records[1:]] == found
    assert all(len(r) == len(records[0]) for r in records)


def test_csv_without_carriage_returns_is_byte_identical_to_csv_writer():
    rows = [ScoreRow(path='a,"b".png', status="ok", score=-0.25, p_value=0.5, flagged=False,
                     nearest=["lf\nref.png"], nearest_distances=[0.1], health="ok"),
            ScoreRow(path="plain.png", status="skipped: not an image file type (.txt)")]
    text = rows_to_csv(rows, with_labels=True)
    records = list(csv.reader(io.StringIO(text, newline="")))
    again = io.StringIO()
    csv.writer(again, lineterminator="\n").writerows(records)   # what the format was before
    assert text == again.getvalue()


# --- 5. spreadsheet formula injection -------------------------------------------------------------

# OWASP "CSV Injection" (https://owasp.org/www-community/attacks/CSV_Injection): cells starting
# with = + - @ TAB or CR are run as formulas by spreadsheets; they must start with a single quote.
FORMULA_NAMES = ['=HYPERLINK("http:x","y").png', "+1.png", "-2.png", "@SUM(A1).png", "\tx.png", "\rx.png",
                 "'=already-quoted.png", "''+two.png", "'plain-quote.png", "a=b.png", "x\udcff=.png"]
TRIGGERS = ("=", "+", "-", "@", "\t", "\r")


def _neutralised(cell: str) -> bool:
    return not cell.startswith(TRIGGERS)


def test_formula_cells_in_the_scores_csv_start_with_a_quote_and_read_back(tmp_path):
    rows = [ScoreRow(path=name, status="-status", score=0.25, p_value=0.5, flagged=False, nearest=["=" + name],
                     nearest_distances=[0.2], health="+health", label=1, kind="@kind") for name in FORMULA_NAMES]
    rows.append(ScoreRow(path="neg.png", status="ok", score=-0.25, p_value=-0.5))   # number cells: not text
    records = _csv_rows(rows_to_csv(rows, with_labels=True))
    for name, record in zip(FORMULA_NAMES, records):
        for column in ("path", "nearest", "health", "status", "kind"):
            assert _neutralised(record[column]), (column, record[column])
        assert path_from_cell(record["path"]) == name
        assert path_from_cell(record["nearest"]) == "=" + name
        assert record["status"] == "'-status" and record["health"] == "'+health" and record["kind"] == "'@kind"
    assert records[0]["path"] == "'=HYPERLINK(\"http:x\",\"y\").png"
    assert records[-1]["score"] == "-0.250000" and records[-1]["p_value"] == "-0.500000"


@pytest.mark.skipif(shutil.which("node") is None, reason="needs Node.js to run the page's export script")
def test_formula_cells_in_the_page_decisions_export_start_with_a_quote_and_read_back():
    from oddling.reporting.page import CSV_CELLS_JS

    # The page's own export functions, run by Node.js on paths as data-path holds them.
    shown = [display_path(name) for name in FORMULA_NAMES]
    script = CSV_CELLS_JS + (f"\nvar names = {json.dumps(shown)};\n"
                             "process.stdout.write(names.map(function (n) { return csvField(csvText(n)) + ',normal'; })"
                             ".join('\\n') + '\\n');")
    exported = subprocess.run(["node", "-e", script], capture_output=True, check=True).stdout.decode("utf-8")
    records = list(csv.reader(io.StringIO(exported, newline="")))
    assert [r[1] for r in records] == ["normal"] * len(FORMULA_NAMES)
    assert all(_neutralised(r[0]) for r in records)
    assert [path_from_cell(r[0]) for r in records] == FORMULA_NAMES


# --- 2. extreme aspect ratios -----------------------------------------------------------------------

def _status(path, **kwargs) -> str:
    from oddling.data.intake import IntakeError, load_rgb

    with pytest.raises(IntakeError) as caught:
        load_rgb(path, **kwargs)
    return caught.value.status


def _refuse_decoding(monkeypatch):
    """Any pixel decoding now fails loudly: a guard that works from the header alone is unaffected."""
    from PIL import ImageFile

    def load(self):
        raise AssertionError("pixels were decoded")
    monkeypatch.setattr(ImageFile.ImageFile, "load", load)


def test_a_tiny_file_of_100000x1_pixels_is_refused_before_decoding(tmp_path, monkeypatch):
    path = tmp_path / "line.png"
    Image.new("L", (100_000, 1)).save(path, optimize=True)
    assert path.stat().st_size < 1000        # a few hundred bytes that would need ~26 GB once resized
    _refuse_decoding(monkeypatch)
    assert _status(path, min_side=256) == "skipped: extreme aspect ratio 100000x1 (limit 50:1)"
    assert _status(path) == "skipped: extreme aspect ratio 100000x1 (limit 50:1)"


def test_aspect_ratio_limit_is_50_to_1_either_way(tmp_path):
    from oddling.data.intake import load_rgb

    for size in [(50, 1), (1, 50)]:
        Image.new("RGB", size).save(tmp_path / "ok.png")
        assert load_rgb(tmp_path / "ok.png").size == size
    Image.new("RGB", (1, 51)).save(tmp_path / "tall.png")
    assert _status(tmp_path / "tall.png") == "skipped: extreme aspect ratio 1x51 (limit 50:1)"


def test_an_image_whose_resize_would_exceed_max_pixels_is_refused_before_decoding(tmp_path, monkeypatch):
    path = tmp_path / "small.png"
    Image.new("RGB", (100, 50)).save(path)
    _refuse_decoding(monkeypatch)
    # Shorter side 50 -> 2000: 4000 x 2000 = 8 000 000 pixels after the resize.
    assert _status(path, min_side=2000, max_pixels=5_000_000) == (
        "skipped: image too large once resized (100x50 to 4000x2000 pixels, limit 5000000)")


# --- 3. what the walk meets besides regular files -------------------------------------------------

def _stub_backbone():
    from types import SimpleNamespace

    from oddling.data.preprocess import Preprocessing

    prep = Preprocessing(resize_shorter=16, crop=16, interpolation="bilinear", mean=(0.0, 0.0, 0.0),
                         std=(1.0, 1.0, 1.0))

    def embed(batch):   # a stand-in network: one unit vector per image
        flat = batch.reshape(len(batch), -1)[:, :4].astype(np.float32) + 1.0
        return flat / np.linalg.norm(flat, axis=1, keepdims=True)
    return SimpleNamespace(preprocessing=prep, embed=embed, embedding_dim=4)


def _statuses(root, paths=None, cache=None) -> dict[str, str]:
    from oddling.embedding.runner import embed_files

    paths = discover(root) if paths is None else paths
    embedded = embed_files(root, paths, _stub_backbone(), progress=False, workers=1, cache=cache)
    return {r.path: r.status for r in embedded.records}


@pytest.mark.skipif(os.name != "posix" or not hasattr(os, "mkfifo"), reason="needs POSIX links, FIFOs and sockets")
def test_every_entry_the_walk_meets_gets_a_row_and_nothing_blocks(tmp_path):
    import socket

    from oddling.data.intake import walk

    root = tmp_path / "in"
    _png(root / "real" / "a.png")
    _png(tmp_path / "outside" / "o.png")
    (root / "broken.png").symlink_to(root / "gone.png")
    (root / "loop1.png").symlink_to(root / "loop2.png")
    (root / "loop2.png").symlink_to(root / "loop1.png")
    os.mkfifo(root / "pipe.png")                   # opening it to read would wait for a writer forever
    (root / "null.png").symlink_to(os.devnull)     # a character device
    server = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    server.bind(str(root / "sock.png"))
    (root / "real" / "up").symlink_to(root, target_is_directory=True)            # a loop back to a parent
    (root / "alias").symlink_to(root / "real", target_is_directory=True)         # a second way to a folder
    (root / "ext").symlink_to(tmp_path / "outside", target_is_directory=True)    # followed, once
    _png(root / ".hidden.png")
    (root / "old.bank").mkdir()
    (root / "old.bank" / "bank.json").write_text("{}")
    try:
        found = walk(root)
        statuses = _statuses(root)
    finally:
        server.close()
    assert statuses == {
        "alias": "skipped: folder already searched (reached again through a symbolic link)",
        "broken.png": "skipped: broken symbolic link",
        "ext/o.png": "ok",
        "loop1.png": "skipped: symbolic link loop",
        "loop2.png": "skipped: symbolic link loop",
        "null.png": "skipped: not a regular file (character device)",
        "pipe.png": "skipped: not a regular file (FIFO)",
        "real/a.png": "ok",
        "real/up": "skipped: folder already searched (reached again through a symbolic link)",
        "sock.png": "skipped: not a regular file (socket)",
    }
    assert found.left_out == {"hidden": 1, "bank folder": 1}   # the documented exclusions, counted


# --- 6. the embedding cache does not change a file's status -----------------------------------------

def test_a_file_gets_the_same_status_with_a_warm_cache_and_without_one(tmp_path):
    from oddling.embedding.cache import EmbeddingCache

    root = tmp_path / "in"
    png = _png(root / "a.png")
    (root / "noext").write_bytes(png.read_bytes())        # the same PNG bytes, no image suffix
    (root / "a.txt").write_bytes(png.read_bytes())
    cache = EmbeddingCache.open(tmp_path / "cache", {"id": "stub"}, "stub")
    assert _statuses(root, [png], cache=cache) == {"a.png": "ok"}   # warms the cache with this content
    warm = _statuses(root, cache=cache)
    cold = _statuses(root)
    assert warm == cold == {"a.png": "ok", "a.txt": "skipped: not an image file type (.txt)",
                            "noext": "skipped: not an image file type (no extension)"}


# --- 7. files holding several frames --------------------------------------------------------------

RED, GREEN, BLUE = (220, 30, 30), (30, 200, 30), (30, 30, 220)


def _frames(path, fmt):
    first, *rest = [Image.new("RGB", (16, 16), c) for c in (RED, GREEN, BLUE)]
    first.save(path, format=fmt, save_all=True, append_images=rest)
    return path


@pytest.mark.parametrize("name, fmt", [("pages.tif", "TIFF"), ("anim.gif", "GIF"), ("anim.webp", "WEBP"),
                                       ("anim.png", "PNG")])
def test_a_multi_frame_file_is_scored_on_its_first_frame_and_says_so(tmp_path, monkeypatch, name, fmt):
    from oddling.data.intake import FRAMES, check_header, frames_note, load_rgb
    from oddling.reporting.results import count_ok

    path = _frames(tmp_path / name, fmt)
    with Image.open(path) as stored:   # outside reference: Pillow's own frame count of the file
        assert stored.n_frames == 3
    image = load_rgb(path)
    assert np.abs(np.asarray(image)[8, 8].astype(int) - RED).max() <= 12   # the first frame
    assert image.info[FRAMES] == 3
    note = frames_note(image.info[FRAMES])
    assert note == "first of 3 frames"
    row = ScoreRow(path=name, status="ok", score=0.1, note=note)
    assert _csv_rows(rows_to_csv([row]))[0]["status"] == "ok (first of 3 frames)"
    assert count_ok([row]) == 1        # the status itself stays "ok": every `== OK` check keeps working
    _refuse_decoding(monkeypatch)
    assert check_header(path) == 3     # the count without decoding, for files whose vector is cached


def test_single_frame_files_and_camera_mpo_jpegs_get_no_note(tmp_path):
    from oddling.data.intake import FRAMES, frames_note, load_rgb

    single = _png(tmp_path / "one.png")
    assert frames_note(load_rgb(single).info[FRAMES]) == ""
    # MPO: the multi-picture JPEG cameras write as .jpg; the second picture is a preview, not a page.
    mpo = _frames(tmp_path / "camera.jpg", "MPO")
    with Image.open(mpo) as stored:
        assert (stored.format, stored.n_frames) == ("MPO", 3)
    assert frames_note(load_rgb(mpo).info[FRAMES]) == ""
    assert _csv_rows(rows_to_csv([ScoreRow(path="one.png", status="ok", score=0.1)]))[0]["status"] == "ok"


def test_decisions_csv_cannot_reach_outside_the_scored_folder(tmp_path):
    """Path traversal (OWASP "Path Traversal"): '../' and absolute paths in a decisions CSV are refused."""
    from oddling.errors import OddlingError
    from oddling.jobs.maintenance import _read_decisions

    scored = tmp_path / "scored"
    scored.mkdir()
    (tmp_path / "secret").mkdir()
    Image.new("RGB", (8, 8)).save(tmp_path / "secret" / "a.png")
    Image.new("RGB", (8, 8)).save(scored / "ok.png")
    for bad in ("../secret/a.png", str(tmp_path / "secret" / "a.png"), "/etc/passwd"):
        decisions = tmp_path / "d.csv"
        decisions.write_text(f"path,decision\nok.png,normal\n{bad},normal\n", encoding="utf-8")
        with pytest.raises(OddlingError, match="outside the scored folder"):
            _read_decisions(decisions, scored)
    decisions.write_text("path,decision\nok.png,normal\n", encoding="utf-8")
    assert _read_decisions(decisions, scored) == [scored / "ok.png"]


def test_animated_gif_status_says_only_the_first_frame_was_scored(tmp_path):
    """Multi-frame files: the scores CSV says "ok (first of 3 frames)", with a warm cache or without."""
    import oddling

    refs = tmp_path / "refs"
    refs.mkdir()
    for i in range(12):
        Image.new("RGB", (24, 24), (20 * i, 100, 150)).save(refs / f"r{i}.png")
    bank = oddling.fit(refs, tmp_path / "b", representation="pixels:16", target_fpr=0.1,
                       options=oddling.RunOptions(progress=False))
    incoming = tmp_path / "in"
    incoming.mkdir()
    frames = [Image.new("RGB", (24, 24), c) for c in ((10, 10, 10), (200, 0, 0), (0, 200, 0))]
    frames[0].save(incoming / "anim.gif", save_all=True, append_images=frames[1:])
    for use_cache in (True, True, False):   # cold cache, warm cache, no cache
        result = oddling.score(incoming, bank, options=oddling.RunOptions(progress=False, use_cache=use_cache))
        assert "ok (first of 3 frames)" in result.to_csv()
