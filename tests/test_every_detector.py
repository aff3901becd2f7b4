"""Every job works on a bank of every detector, or refuses with a clear message where it cannot apply.

Banks are fitted on scikit-learn's bundled digits (tests/conftest.py) with the pixel
representation, which needs no network, so each detector is quick to fit.
"""
import html
import json
import shutil

import pytest
from click.testing import CliRunner

import oddling
from oddling.cli import main
from oddling.detectors import DETECTORS
from oddling.errors import OddlingError
from oddling.reporting.page import write_report

OPTS = oddling.RunOptions(progress=False)
VECTOR_DETECTORS = [name for name in DETECTORS if name != "patch-knn"]
pytestmark = pytest.mark.filterwarnings("ignore::oddling.OddlingWarning")


@pytest.fixture(scope="module", params=VECTOR_DETECTORS)
def bank(request, digits_folders, tmp_path_factory):
    path = tmp_path_factory.mktemp("every") / f"{request.param}.bank"
    return oddling.fit(digits_folders["reference"], path, representation="pixels:16", detector=request.param,
                       target_fpr=0.05, options=OPTS)


def test_score_evaluate_and_page_speak_the_detectors_words(bank, digits_folders, tmp_path):
    scored = oddling.score(digits_folders["incoming"], bank, options=OPTS)
    assert all(r.score is not None for r in scored.rows)
    # Outside reference: the labels the digits fixture wrote (scikit-learn's digits targets).
    evaluation = oddling.evaluate(digits_folders["test"], bank, options=OPTS)
    assert evaluation.metrics["auroc"] > 0.9
    page = write_report(tmp_path / "page.html", scored).read_text(encoding="utf-8")
    assert html.escape(bank.detector.describe_score().split(";")[0]) in page
    assert "leave-one-out" not in page or bank.detector.name == "knn"


def test_drift_audit_add_remove_work(bank, digits_folders, tmp_path):
    copy = tmp_path / "b"
    shutil.copytree(bank.path, copy)
    assert "shift" in oddling.drift(digits_folders["incoming"], copy, n_permutations=50, options=OPTS)
    assert "findings" in oddling.audit(copy)
    before = oddling.load_bank(copy).size
    extra = tmp_path / "extra"
    extra.mkdir()
    for p in sorted(digits_folders["incoming"].glob("*.png"))[:3]:
        shutil.copy(p, extra / f"new_{p.name}")
    assert oddling.bank_add(copy, extra, options=OPTS)["added"] == 3
    reloaded = oddling.load_bank(copy)
    assert reloaded.size == before + 3 and reloaded.detector.name == bank.detector.name
    assert len(reloaded.calibration_scores) == reloaded.size
    oddling.bank_remove(copy, [r["path"] for r in reloaded.references[before:]])
    assert oddling.load_bank(copy).size == before


def test_bank_info_names_detector_and_score(bank):
    result = CliRunner().invoke(main, ["bank", "info", str(bank.path)])
    assert result.exit_code == 0, result.output
    assert bank.detector.name in result.output and "calibration" in result.output
    info = json.loads(CliRunner().invoke(main, ["bank", "info", str(bank.path), "--json"]).stdout)
    assert info["detector"]["name"] == bank.detector.name and info["representation"]["id"] == "pixels:16"


def test_jobs_that_need_reference_vectors_refuse_a_patch_bank(digits_folders, tmp_path):
    bank = oddling.fit(digits_folders["reference"], tmp_path / "p", detector="patch-knn", target_fpr=0.05,
                       options=OPTS)
    for job in (lambda: oddling.audit(bank), lambda: oddling.drift(digits_folders["incoming"], bank, options=OPTS),
                lambda: oddling.bank_add(tmp_path / "p", digits_folders["incoming"], options=OPTS)):
        with pytest.raises(OddlingError, match="patch grids are not kept"):
            job()


def test_pairing_a_patch_detector_with_vectors_is_refused(digits_folders, tmp_path):
    result = CliRunner().invoke(main, ["fit", str(digits_folders["reference"]), "--bank", str(tmp_path / "x"),
                                       "--detector", "patch-knn", "--representation", "pixels:16", "-q"])
    assert result.exit_code == 2 and "patch" in result.stderr and "Traceback" not in result.output
    result = CliRunner().invoke(main, ["fit", str(digits_folders["reference"]), "--bank", str(tmp_path / "y"),
                                       "--detector", "pca", "--k", "3", "-q"])
    assert result.exit_code == 2 and "--k applies to the knn detector" in result.stderr
