"""The scored-image log: schema, WAL, append-only, indexes, export, two writing processes; and the
commands that write and read it (score --log, drift --log, report --log, log export)."""
from __future__ import annotations

import csv
import json
import multiprocessing
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

import oddling
from oddling.cli import main
from oddling.errors import OddlingError
from oddling.logbook.records import export_rows
from oddling.logbook.store import (SCHEMA_VERSION, LogRow, ScoreLog, bank_fingerprint, default_log_path,
                                   parse_time)

from conftest import write_digit


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A bank fitted on 12 digit zeros (target rate 0.1) and a folder of 4 zeros and 4 threes."""
    from sklearn.datasets import load_digits

    digits = load_digits()
    root = tmp_path_factory.mktemp("logbook")
    ref, incoming = root / "ref", root / "incoming"
    ref.mkdir()
    incoming.mkdir()
    zeros = np.flatnonzero(digits.target == 0)
    for i in zeros[:12]:
        write_digit(digits.images[i], ref / f"r{i:04d}.png")
    for i in list(zeros[12:16]) + list(np.flatnonzero(digits.target == 3)[:4]):
        write_digit(digits.images[i], incoming / f"q{i:04d}.png")
    bank = oddling.fit(ref, root / "small.bank", target_fpr=0.1, options=oddling.RunOptions(progress=False))
    return {"root": root, "bank": bank, "incoming": incoming}


def _row(i: int, **kw) -> LogRow:
    return LogRow(**({"source": "score", "name": f"f{i}.png", "status": "ok", "bank": "b" * 16,
                      "sha256": f"{i:064x}", "score": 0.01 * i, "p_value": 0.5, "flagged": False} | kw))


def test_schema_meta_and_wal(tmp_path):
    path = tmp_path / "x.log.sqlite"
    with ScoreLog(path, bank_path=tmp_path / "some.bank") as log:
        log.append([_row(1)])
        assert log.meta()["schema_version"] == str(SCHEMA_VERSION) == "1"
        assert log.meta()["bank"] == str(tmp_path / "some.bank")
    raw = sqlite3.connect(path)
    try:
        assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"   # persisted in the file
        columns = [r[1] for r in raw.execute("PRAGMA table_info(scored)")]
        assert columns == ["id", "time", "source", "name", "path", "sha256", "score", "p_value", "flagged",
                           "nearest", "nearest_distance", "neighbours", "health", "status", "bank", "request"]
        time_text = raw.execute("SELECT time FROM scored").fetchone()[0]
        assert time_text.endswith("+00:00") and "T" in time_text   # UTC ISO 8601
    finally:
        raw.close()


def test_append_only(tmp_path):
    path = tmp_path / "x.sqlite"
    with ScoreLog(path) as log:
        log.append([_row(1), _row(2)])
    raw = sqlite3.connect(path)
    try:
        for statement in ("UPDATE scored SET score = 0", "DELETE FROM scored"):
            with pytest.raises(sqlite3.DatabaseError, match="append-only"):
                raw.execute(statement)
        assert raw.execute("SELECT COUNT(*) FROM scored").fetchone()[0] == 2
    finally:
        raw.close()


def test_indexes_serve_time_and_hash_queries(tmp_path):
    path = tmp_path / "x.sqlite"
    ScoreLog(path).close()
    raw = sqlite3.connect(path)
    try:
        names = {r[1] for r in raw.execute("PRAGMA index_list(scored)")}
        assert {"scored_time", "scored_sha256"} <= names
        plan = " ".join(str(r) for r in raw.execute("EXPLAIN QUERY PLAN SELECT * FROM scored WHERE time >= '2024'"))
        assert "scored_time" in plan
        plan = " ".join(str(r) for r in raw.execute("EXPLAIN QUERY PLAN SELECT * FROM scored WHERE sha256 = 'x'"))
        assert "scored_sha256" in plan
    finally:
        raw.close()


def test_rows_last_since_and_round_trip(tmp_path):
    with ScoreLog(tmp_path / "x.sqlite") as log:
        log.append([_row(i, time=f"2024-05-0{i}T00:00:00.000000+00:00", neighbours=[["r.png", 0.1]])
                    for i in range(1, 6)])
        assert [r.name for r in log.rows(last=2)] == ["f4.png", "f5.png"]
        assert [r.name for r in log.rows(since=parse_time("2024-05-03"))] == ["f3.png", "f4.png", "f5.png"]
        assert [r.name for r in log.rows(since=parse_time("2024-05-02"), until=parse_time("2024-05-04"))] == [
            "f2.png", "f3.png"]
        row = log.rows(last=1)[0]
        assert row.neighbours == [["r.png", 0.1]] and row.flagged is False and row.score == pytest.approx(0.05)


def test_parse_time():
    assert parse_time("2024-05-01") == "2024-05-01T00:00:00.000000+00:00"
    assert parse_time("2024-05-01T10:00:00+02:00") == "2024-05-01T08:00:00.000000+00:00"
    assert parse_time("2024-05-01T10:00:00Z") == "2024-05-01T10:00:00.000000+00:00"
    with pytest.raises(OddlingError, match="not a time"):
        parse_time("yesterday")


def test_refuses_what_is_not_a_log(tmp_path):
    (tmp_path / "a.sqlite").write_text("hello, not a database")
    with pytest.raises(OddlingError, match="not an oddling log"):
        ScoreLog(tmp_path / "a.sqlite")
    with pytest.raises(OddlingError, match="does not exist"):
        ScoreLog(tmp_path / "missing.sqlite", create=False)
    newer = tmp_path / "newer.sqlite"
    ScoreLog(newer).close()
    raw = sqlite3.connect(newer)
    raw.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    raw.commit()
    raw.close()
    with pytest.raises(OddlingError, match="schema version 99"):
        ScoreLog(newer)


def test_export_csv_is_spreadsheet_safe(tmp_path):
    with ScoreLog(tmp_path / "x.sqlite") as log:
        log.append([_row(1, name="=HYPERLINK(evil).png"), _row(2, name="a,b.png", score=None, p_value=None,
                                                                 flagged=None, status="unreadable: empty file")])
        out = export_rows(log.rows(), tmp_path / "out.csv")
    rows = list(csv.DictReader(out.open(encoding="utf-8")))
    assert rows[0]["name"] == "'=HYPERLINK(evil).png"
    assert rows[1]["name"] == "a,b.png" and rows[1]["score"] == "" and rows[1]["status"] == "unreadable: empty file"
    assert rows[0]["score"] == "0.010000" and rows[0]["flagged"] == "false"
    with pytest.raises(OddlingError, match="already exists"):
        export_rows([], out)


def test_export_parquet_needs_pyarrow(tmp_path):
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        with pytest.raises(OddlingError, match="pyarrow"):
            export_rows([_row(1)], tmp_path / "out.parquet")
    else:
        import pyarrow.parquet as pq

        out = export_rows([_row(1)], tmp_path / "out.parquet")
        assert pq.read_table(out).num_rows == 1


def _write_many(path: str, tag: str, n: int) -> None:
    with ScoreLog(path) as log:
        for i in range(n):
            log.append([_row(i, name=f"{tag}-{i}.png", source="watch")])


def test_two_processes_write_at_once(tmp_path):
    path = tmp_path / "shared.sqlite"
    ScoreLog(path).close()
    context = multiprocessing.get_context("spawn")
    writers = [context.Process(target=_write_many, args=(str(path), tag, 150)) for tag in ("a", "b")]
    for w in writers:
        w.start()
    for w in writers:
        w.join(timeout=120)
        assert w.exitcode == 0
    with ScoreLog(path) as log:
        rows = log.rows()
        assert log.integrity() == "ok"
    assert len(rows) == 300
    assert len({r.name for r in rows}) == 300
    assert len({r.id for r in rows}) == 300
    # each writer's rows keep their own order
    for tag in ("a", "b"):
        mine = [int(r.name.split("-")[1].split(".")[0]) for r in rows if r.name.startswith(tag)]
        assert mine == list(range(150))


# ---- the commands ------------------------------------------------------------------------------

def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def test_score_log_then_drift_report_and_export(small, tmp_path):
    bank = small["bank"]
    out = tmp_path / "s.csv"
    result = run("score", small["incoming"], "--bank", bank.path, "--out", out, "-q", "--json", "--log")
    assert result.exit_code == 0, result.output
    log_path = default_log_path(bank.path)
    assert json.loads(result.stdout)["log"] == str(log_path)
    with ScoreLog(log_path, create=False) as log:
        rows = log.rows()
    csv_rows = {r["path"]: r for r in csv.DictReader(out.open())}
    assert {r.name for r in rows} == set(csv_rows) and len(rows) == 8
    for r in rows:
        assert r.source == "score" and r.bank == bank_fingerprint(bank)
        assert Path(r.path).is_absolute() and Path(r.path).is_file()
        assert f"{r.score:.6f}" == csv_rows[r.name]["score"] and r.nearest == csv_rows[r.name]["nearest"]
        assert len(r.neighbours) == 5 and r.sha256

    drift = run("drift", "--log", log_path, "--bank", bank.path, "--last", 8, "--json", "-q", "--permutations", 99)
    assert drift.exit_code == 0, drift.output
    verdict = json.loads(drift.stdout)
    assert verdict["n_rows"] == 8 and verdict["n_batch"] == 8 and verdict["n_without_features"] == 0
    assert set(verdict) >= {"shift", "mmd_p_value", "binomial_p_value", "flagged_share"}
    since = run("drift", "--log", log_path, "--since", "1h", "--json", "-q", "--permutations", 99)   # bank from the log
    assert since.exit_code == 0, since.output
    assert json.loads(since.stdout)["n_rows"] == 8
    assert run("drift", "--log", log_path, "-q").exit_code == 2   # neither --last nor --since

    page = tmp_path / "page.html"
    report = run("report", "--log", log_path, "--bank", bank.path, "--since", "1h", "--out", page)
    assert report.exit_code == 0, report.output
    text = page.read_text(encoding="utf-8")
    assert text.count('class="card') >= 8 and "data:image/jpeg;base64" in text

    export = tmp_path / "x.csv"
    assert run("log", "export", "--log", log_path, "--since", "2000-01-01", "--out", export).exit_code == 0
    assert len(list(csv.DictReader(export.open()))) == 8
    assert run("log", "export", "--bank", bank.path, "--out", export).exit_code == 2   # exists, no --force


def test_report_from_log_shows_placeholder_for_gone_files(small, tmp_path):
    import shutil

    incoming = tmp_path / "gone"
    shutil.copytree(small["incoming"], incoming)
    log_path = tmp_path / "own.log.sqlite"
    result = run("score", incoming, "--bank", small["bank"].path, "--out", tmp_path / "s.csv", "-q", "--log", log_path)
    assert result.exit_code == 0, result.output
    removed = sorted(incoming.iterdir())[0]
    removed.unlink()
    Image.new("RGB", (64, 64), "red").save(sorted(incoming.iterdir())[0])   # changed since it was logged
    page = tmp_path / "page.html"
    report = run("report", "--log", log_path, "--bank", small["bank"].path, "--last", 100, "--out", page)
    assert report.exit_code == 0, report.output
    assert page.read_text(encoding="utf-8").count("no preview") == 2


def test_bad_log_option_is_one_line_error(small, tmp_path):
    result = run("score", small["incoming"], "--bank", small["bank"].path, "--out", tmp_path / "s.csv", "-q",
                 "--log", tmp_path / "no" / "such" / "dir.sqlite")
    assert result.exit_code == 2 and "does not exist" in result.stderr
    assert not (tmp_path / "s.csv").exists()
