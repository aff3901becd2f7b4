"""The command line: exit codes, messages instead of tracebacks, every input file accounted for."""
import csv
import json
import shutil

import pytest
from click.testing import CliRunner

from oddling.cli import main


@pytest.fixture()
def mixed_incoming(digits_folders, tmp_path):
    """Held-out digits plus the kinds of broken files a real folder holds."""
    folder = tmp_path / "incoming"
    shutil.copytree(digits_folders["incoming"], folder)
    (folder / "empty.png").write_bytes(b"")
    (folder / "notes.txt").write_text("not an image")
    (folder / "garbage.jpg").write_bytes(b"\x00\x01 this is not a jpeg" * 20)
    good = next(digits_folders["incoming"].glob("*.png")).read_bytes()
    (folder / "truncated.png").write_bytes(good[: len(good) // 2])
    (folder / ".hidden.png").write_bytes(good)
    return folder


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def test_score_accounts_for_every_file(digits_bank, mixed_incoming, tmp_path):
    out = tmp_path / "scores.csv"
    result = run("score", mixed_incoming, "--bank", digits_bank.path, "--out", out, "--quiet", "--json")
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader(out.open()))
    by_path = {r["path"]: r for r in rows}
    visible = {p.name for p in mixed_incoming.iterdir() if not p.name.startswith(".")}
    assert set(by_path) == visible                       # nothing dropped, hidden file not swept in
    assert by_path["empty.png"]["status"].startswith("unreadable: empty")
    assert by_path["notes.txt"]["status"].startswith("skipped: not an image")
    assert by_path["garbage.jpg"]["status"].startswith("unreadable")
    assert by_path["truncated.png"]["status"].startswith("unreadable")
    assert all(by_path[n]["score"] == "" for n in ("empty.png", "notes.txt", "garbage.jpg", "truncated.png"))
    summary = json.loads(result.stdout)
    assert summary["n_skipped"] == 4 and summary["n_scored"] == len(rows) - 4


def test_existing_output_needs_force(digits_bank, digits_folders, tmp_path):
    out = tmp_path / "scores.csv"
    out.write_text("keep me")
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", out, "-q")
    assert result.exit_code == 2
    assert "already exists" in result.stderr and out.read_text() == "keep me"


def test_fail_on_flagged_exits_1_when_anything_is_flagged(digits_bank, digits_folders, tmp_path):
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", tmp_path / "s.csv",
                 "-q", "--json", "--fail-on-flagged", "--target-fpr", "0.2")
    assert json.loads(result.stdout)["n_flagged"] > 0
    assert result.exit_code == 1


def test_too_few_images_is_a_clear_error(digits_folders, tmp_path):
    few = tmp_path / "few"
    few.mkdir()
    for p in sorted(digits_folders["reference"].glob("*.png"))[:3]:
        shutil.copy(p, few / p.name)
    result = run("fit", few, "--bank", tmp_path / "b", "--k", "5", "-q")
    assert result.exit_code == 2
    assert "at least k+1 = 6" in result.stderr
    assert not (tmp_path / "b").exists()


def test_missing_bank_is_usage_error(digits_folders, tmp_path):
    result = run("score", digits_folders["incoming"], "--bank", tmp_path / "nope", "--out", tmp_path / "s.csv")
    assert result.exit_code == 2


def test_folder_that_is_not_a_bank_is_refused(digits_folders, tmp_path):
    result = run("score", digits_folders["incoming"], "--bank", digits_folders["reference"], "--out", tmp_path / "s.csv")
    assert result.exit_code == 2 and "not an oddling bank" in result.stderr


def test_bank_with_other_backbone_refused(digits_bank, digits_folders, tmp_path):
    shutil.copytree(digits_bank.path, tmp_path / "b")
    meta_path = tmp_path / "b" / "bank.json"
    meta = json.loads(meta_path.read_text())
    meta["representation"]["backbone_fingerprint"]["weights_sha256"] = "f" * 64
    meta_path.write_text(json.dumps(meta))
    result = run("score", digits_folders["incoming"], "--bank", tmp_path / "b", "--out", tmp_path / "s.csv", "-q")
    assert result.exit_code == 2
    assert "weights SHA-256" in result.stderr


def test_fit_refuses_existing_bank_without_force(digits_bank, digits_folders):
    result = run("fit", digits_folders["reference"], "--bank", digits_bank.path, "-q")
    assert result.exit_code == 2 and "--force" in result.stderr


def test_backbones_list_names_the_default():
    result = run("backbones", "list")
    assert result.exit_code == 0 and "efficientnet-lite0 (default)" in result.output


@pytest.mark.parametrize("args, code", [(("backbones", "list"), 0), (("bank", "info", "no-such.bank"), 2)])
def test_a_command_puts_back_the_warning_hook_it_set(monkeypatch, args, code):
    # The CLI prints warnings as one "warning: ..." line while a command runs; a caller in the same
    # process (the Python API after a CLI call) keeps its own hook afterwards.
    import signal
    import warnings

    def mine(message, category, filename, lineno, file=None, line=None):
        pass

    monkeypatch.setattr(warnings, "showwarning", mine)
    sigterm = signal.getsignal(signal.SIGTERM)
    assert run(*args).exit_code == code
    assert warnings.showwarning is mine and signal.getsignal(signal.SIGTERM) is sigterm
