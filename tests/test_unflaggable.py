"""A bank that cannot flag at its rate never passes silently (conformal p-values are at least
1/(n+1), so fewer than 1/a - 1 calibration scores can flag nothing at rate a: Vovk et al. 2005).

Banks are fitted on scikit-learn's bundled digits (tests/conftest.py) with the pixel
representation, which needs no network.
"""
import json
import shutil

import pytest
from click.testing import CliRunner

import oddling
from oddling.cli import main
from oddling.errors import OddlingError

OPTS = oddling.RunOptions(progress=False)


@pytest.fixture(scope="module")
def eighty(digits_folders, tmp_path_factory):
    """80 reference digits: enough for 0.02 (49 calibration scores), not for 0.01 (99)."""
    folder = tmp_path_factory.mktemp("eighty")
    for p in sorted(digits_folders["reference"].glob("*.png"))[:80]:
        shutil.copy(p, folder / p.name)
    return folder


@pytest.fixture(scope="module")
def no_cutoff_bank(eighty, tmp_path_factory):
    path = tmp_path_factory.mktemp("nocut") / "b"
    result = run("fit", eighty, "--bank", path, "--representation", "pixels:16", "--target-fpr", "0.01",
                 "--allow-no-cutoff")
    assert result.exit_code == 0, result.output
    return path


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args] + ["-q"])


def test_fit_without_a_rate_takes_the_first_one_the_bank_supports_and_says_why(eighty, tmp_path):
    result = run("fit", eighty, "--bank", tmp_path / "b", "--representation", "pixels:16")
    assert result.exit_code == 0, result.output
    assert "target false-alarm rate 0.02: 0.01 needs at least 99 calibration scores, this bank has 80" in result.stderr
    bank = oddling.load_bank(tmp_path / "b")
    assert bank.target_fpr == 0.02 and bank.threshold().can_flag


def test_fit_with_a_rate_it_cannot_support_is_exit_2_with_the_numbers(eighty, tmp_path):
    result = run("fit", eighty, "--bank", tmp_path / "b", "--representation", "pixels:16", "--target-fpr", "0.01")
    assert result.exit_code == 2 and "Traceback" not in result.output
    assert "0.01 needs at least 99 calibration scores, this bank has 80" in result.stderr
    assert not (tmp_path / "b").exists()                 # nothing written


def test_allow_no_cutoff_writes_a_bank_that_says_it_cannot_flag(no_cutoff_bank):
    bank = oddling.load_bank(no_cutoff_bank)
    assert bank.calibration["cutoff"] is None and not bank.threshold().can_flag
    info = json.loads(CliRunner().invoke(main, ["bank", "info", str(no_cutoff_bank), "--json"]).stdout)
    assert info["can_flag"] is False and info["promise"].startswith("none")


def test_score_fail_on_flagged_refuses_a_bank_that_cannot_flag(no_cutoff_bank, digits_folders, tmp_path):
    result = run("score", digits_folders["incoming"], "--bank", no_cutoff_bank, "--out", tmp_path / "s.csv",
                 "--fail-on-flagged")
    assert result.exit_code == 2 and "--fail-on-flagged needs a bank that can flag" in result.stderr
    assert not (tmp_path / "s.csv").exists()
    # without the gate the run goes on, with a warning that nothing can be flagged
    result = run("score", digits_folders["incoming"], "--bank", no_cutoff_bank, "--out", tmp_path / "t.csv")
    assert result.exit_code == 0 and "no image can be flagged at all" in result.stderr


def test_a_target_rate_override_the_bank_cannot_support_is_refused_by_the_gate(digits_bank, digits_folders, tmp_path):
    # digits_bank has 100 references: rates below 1/101 flag nothing
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", tmp_path / "s.csv",
                 "--fail-on-flagged", "--target-fpr", "0.005")
    assert result.exit_code == 2 and "0.005 needs at least 199 calibration scores, this bank has 100" in result.stderr


def test_watch_and_serve_refuse_a_bank_that_cannot_flag(no_cutoff_bank, tmp_path):
    incoming = tmp_path / "in"
    incoming.mkdir()
    for command in (["watch", incoming, "--bank", no_cutoff_bank, "--max-polls", "1", "--no-log"],
                    ["serve", "--bank", no_cutoff_bank, "--port", "0", "--no-log"]):
        result = CliRunner().invoke(main, [str(a) for a in command])
        assert result.exit_code == 2 and "needs a bank that can flag" in result.stderr, result.output
    with pytest.raises(OddlingError, match="watch needs a bank that can flag"):
        oddling.Watcher(incoming, no_cutoff_bank, log=None)
    with pytest.raises(OddlingError, match="serve needs a bank that can flag"):
        oddling.serve_app(no_cutoff_bank)


def test_the_confident_guarantee_is_recorded_and_said(digits_folders, tmp_path):
    result = run("fit", digits_folders["reference"], "--bank", tmp_path / "b", "--representation", "pixels:16",
                 "--guarantee", "confident", "--target-fpr", "0.05")
    assert result.exit_code == 0, result.output
    assert "false-alarm rate at most 5% with 90% confidence for this bank" in result.stderr
    bank = oddling.load_bank(tmp_path / "b")
    assert bank.calibration["guarantee"] == "confident" and bank.calibration["confidence"] == 0.9
    marginal = oddling.fit(digits_folders["reference"], None, representation="pixels:16", target_fpr=0.05, options=OPTS)
    assert bank.threshold().cutoff >= marginal.threshold().cutoff     # a higher rank: fewer flags
    result = run("fit", digits_folders["reference"], "--bank", tmp_path / "c", "--representation", "pixels:16",
                 "--confidence", "0.8")
    assert result.exit_code == 2 and "--confidence applies to --guarantee confident" in result.stderr


def test_p_values_at_the_floor_are_named_in_the_csv_and_the_json(digits_bank, digits_folders, tmp_path):
    # A conformal p-value is at least 1/(n+1) (Vovk et al. 2005): every image scoring above all 100
    # calibration scores gets 1/101, and only its score still ranks it.
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", tmp_path / "s.csv",
                 "--json")
    summary = json.loads(result.stdout)
    assert summary["p_value_floor"] == pytest.approx(1 / 101, abs=1e-6)
    import csv

    rows = list(csv.DictReader(open(tmp_path / "s.csv", encoding="utf-8")))
    at_floor = [r for r in rows if r["p_value"] and abs(float(r["p_value"]) - 1 / 101) < 1e-6]
    assert at_floor and summary["n_at_p_value_floor"] == len(at_floor)
    assert all(r["status"] == "ok (above all 100 calibration scores)" for r in at_floor)
    assert not any("calibration scores" in r["status"] for r in rows if r not in at_floor)


def test_a_patch_bank_of_100_references_can_flag_at_one_percent(digits_folders, tmp_path):
    # Cross-conformal calibration scores every reference: 100 scores, and 0.01 needs 99 (1/(n+1) <= a).
    result = run("fit", digits_folders["reference"], "--bank", tmp_path / "p", "--detector", "patch-knn",
                 "--target-fpr", "0.01")
    assert result.exit_code == 0, result.output
    bank = oddling.load_bank(tmp_path / "p")
    assert bank.size == 100 and bank.calibration["n"] == 100 and bank.calibration["cutoff"] is not None
