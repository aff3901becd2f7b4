"""A new user's first hour: what the commands do when the input is odd, empty or a mistake.

Each test replays one finding of the "first hour of a new user" issue through the command line.
"""
import json
import shutil

import pytest
from click.testing import CliRunner

import oddling
from oddling.cli import main

QUIET = oddling.RunOptions(progress=False)


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture()
def bank_copy(digits_bank, tmp_path):
    target = tmp_path / "copy.bank"
    shutil.copytree(digits_bank.path, target)
    return target


def _audit_json(tmp_path, findings):
    path = tmp_path / "audit.json"
    path.write_text(json.dumps({"findings": [{"path": p, "kind": k, "detail": "planted"} for p, k in findings]}))
    return path


# 1. bank remove: never destructive without saying what goes

def test_remove_with_an_audit_json_needs_kind_or_all(bank_copy, tmp_path):
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(refs[0], "outlier"), (refs[1], "duplicate"), (refs[2], "duplicate")])
    result = run("bank", "remove", bank_copy, audit)
    assert result.exit_code == 2
    assert "--kind" in result.stderr and "--all" in result.stderr and "2 duplicate" in result.stderr
    assert oddling.load_bank(bank_copy).size == len(refs)


def test_remove_dry_run_lists_path_and_kind_and_changes_nothing(bank_copy, tmp_path):
    before = (bank_copy / "bank.json").read_bytes()
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(refs[0], "outlier"), (refs[0], "health"), (refs[1], "duplicate")])
    result = run("bank", "remove", bank_copy, audit, "--kind", "outlier", "--kind", "health", "--dry-run")
    assert result.exit_code == 0, result.output
    assert "Would remove 1 reference:" in result.stderr
    assert f"{refs[0]}  (outlier, health)" in result.stderr and refs[1] not in result.stderr
    assert (bank_copy / "bank.json").read_bytes() == before


def test_remove_lists_first_then_says_removed_1_reference(bank_copy, tmp_path):
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(refs[0], "outlier"), (refs[1], "duplicate")])
    result = run("bank", "remove", bank_copy, audit, "--kind", "outlier")
    assert result.exit_code == 0, result.output
    assert result.stderr.index(refs[0]) < result.stderr.index("Removed 1 reference;")
    assert f"now holds {len(refs) - 1} references." in result.stderr
    assert [r["path"] for r in oddling.load_bank(bank_copy).references] == refs[1:]


def test_remove_that_leaves_too_few_is_refused_and_changes_nothing(bank_copy, tmp_path):
    before = (bank_copy / "bank.json").read_bytes()
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(p, "outlier") for p in refs[:-3]])
    result = run("bank", "remove", bank_copy, audit, "--all")
    assert result.exit_code == 2
    assert "Removing 97 references:" in result.stderr            # the list came first
    assert "would leave 3" in result.stderr and "nothing was changed" in result.stderr
    assert "Traceback" not in result.output
    assert (bank_copy / "bank.json").read_bytes() == before


def test_remove_of_a_path_not_in_the_bank_is_an_error_naming_it(bank_copy):
    before = (bank_copy / "bank.json").read_bytes()
    result = run("bank", "remove", bank_copy, "no_such.png")
    assert result.exit_code == 2
    assert "no_such.png" in result.stderr and "nothing was changed" in result.stderr
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    result = run("bank", "remove", bank_copy, refs[0], "typo.png")     # one typo: nothing goes
    assert result.exit_code == 2 and "1 path not in bank" in result.stderr and "typo.png" in result.stderr
    assert (bank_copy / "bank.json").read_bytes() == before


def test_kind_without_an_audit_json_is_an_error(bank_copy):
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    result = run("bank", "remove", bank_copy, refs[0], "--kind", "outlier")
    assert result.exit_code == 2 and "audit JSON" in result.stderr
