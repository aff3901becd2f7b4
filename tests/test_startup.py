"""Start-up: what a fresh interpreter imports. `import oddling`, `bank info`, drift history,
scoring a kNN bank of the default embedding whose export is verified, and scoring a patch bank
whose stage export is verified must never load torch (about 3 s of imports); each check runs in
a new process and reads sys.modules."""
from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

pytest.importorskip("openvino")


def fresh(code: str) -> dict:
    """Run `code` in a new interpreter (same environment: cache folder, PYTHONPATH); it must end by
    leaving `out` (a dict); returns it with whether torch was loaded."""
    program = (f"import json, sys\nout = {{}}\n{code}\n"
               "out['torch_loaded'] = 'torch' in sys.modules\nprint('RESULT' + json.dumps(out))")
    done = subprocess.run([sys.executable, "-c", program], capture_output=True, text=True, env=dict(os.environ))
    assert done.returncode == 0, done.stderr
    line = next(l for l in done.stdout.splitlines() if l.startswith("RESULT"))
    return json.loads(line[len("RESULT"):])


def test_importing_oddling_does_not_load_torch():
    out = fresh("import oddling\nout['version'] = oddling.__version__\nout['has_score'] = callable(oddling.score)")
    assert out == {"version": out["version"], "has_score": True, "torch_loaded": False}


def test_the_patch_detector_module_imports_without_torch():
    out = fresh("from oddling.detectors import make_detector\nmake_detector('patch-knn')\n"
                "import oddling.backbones.patch_grid as p\nout['grid'] = p.grid_size(224)")
    assert out["grid"] == 28 and not out["torch_loaded"]


@pytest.fixture(scope="module")
def bank_path(digits_bank):
    """The digits kNN bank, fitted with the default runtime: its export is verified in the cache."""
    return str(digits_bank.path)


def test_bank_info_and_drift_history_do_not_load_torch(bank_path, digits_folders, tmp_path):
    import shutil

    import oddling

    copy = tmp_path / "digits.bank"
    shutil.copytree(bank_path, copy)
    oddling.drift(digits_folders["incoming"], copy, options=oddling.RunOptions(progress=False))
    out = fresh(f"import oddling\nout['n'] = oddling.bank_info({str(copy)!r})['n_references']\n"
                f"out['runs'] = len(oddling.drift_history({str(copy)!r}))")
    assert out["n"] > 0 and out["runs"] == 1 and not out["torch_loaded"]
    cli = fresh("from click.testing import CliRunner\nfrom oddling.cli import main\n"
                f"r = CliRunner().invoke(main, ['bank', 'info', {str(copy)!r}])\nout['code'] = r.exit_code\n"
                f"r = CliRunner().invoke(main, ['drift', '--history', {str(copy)!r}, '--plot', "
                f"{str(tmp_path / 'drift.png')!r}])\nout['history_code'] = r.exit_code")
    assert cli == {"code": 0, "history_code": 0, "torch_loaded": False}


def test_scoring_a_knn_bank_with_a_verified_export_does_not_load_torch(bank_path, digits_folders):
    out = fresh(
        "import oddling\n"
        "options = oddling.RunOptions(use_cache=False, progress=False)\n"   # the network really runs
        f"result = oddling.score({str(digits_folders['incoming'])!r}, {bank_path!r}, options=options)\n"
        "out['scored'] = len(result.scored)\n"
        "from oddling.jobs.reading import load_bank_representation\n"
        f"rep = load_bank_representation(oddling.load_bank({bank_path!r}), options)\n"
        "out['runtime'] = rep.runtime\nout['network_built'] = rep.backbone._network is not None")
    assert out["scored"] > 0 and out["runtime"] == "openvino"
    assert not out["network_built"] and not out["torch_loaded"]


def test_the_cli_score_command_does_not_load_torch(bank_path, digits_folders, tmp_path):
    out = fresh("from click.testing import CliRunner\nfrom oddling.cli import main\n"
                f"r = CliRunner().invoke(main, ['score', {str(digits_folders['incoming'])!r}, '--bank', {bank_path!r}, "
                f"'--out', {str(tmp_path / 's.csv')!r}, '--no-cache', '-q'])\nout['code'] = r.exit_code")
    assert out == {"code": 0, "torch_loaded": False}


@pytest.mark.filterwarnings("ignore::oddling.api.OddlingWarning")   # few calibration images for 1%, expected
def test_scoring_a_patch_bank_with_a_verified_stage_export_does_not_load_torch(digits_folders, tmp_path):
    import oddling

    bank = tmp_path / "patch.bank"
    # fitted with the default runtime: the stage export is verified in the cache (fit itself needs torch)
    oddling.fit(digits_folders["reference"], bank, detector="patch-knn", options=oddling.RunOptions(progress=False))
    out = fresh(
        "import oddling\n"
        "options = oddling.RunOptions(use_cache=False, progress=False)\n"
        f"result = oddling.score({str(digits_folders['incoming'])!r}, {str(bank)!r}, options=options)\n"
        "out['scored'] = len(result.scored)\nout['grid'] = len(result.scored[0].anomaly_grid)")
    assert out["scored"] > 0 and out["grid"] == 28 and not out["torch_loaded"]
