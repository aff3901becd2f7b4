"""The demo runs the whole job on the invented scenario (small counts here to stay quick)."""
import json

import pytest
from click.testing import CliRunner

from oddling.cli import main
from oddling.demo.run import MARKER, run_demo
from oddling.demo.scene import SceneCounts

SMALL = SceneCounts(reference=40, incoming_normal=8, incoming_anomalous=6, test_normal=12, test_per_kind=3)


def test_demo_produces_every_result(tmp_path):
    import oddling

    said = []
    out = run_demo(tmp_path / "demo", counts=SMALL, options=oddling.RunOptions(progress=False), log=said.append)
    # 40 calibration scores cannot flag at 0.01 (that needs 99: conformal p-values are >= 1/41), so the
    # bank takes the first default rate they support, 0.02 needing 49, 0.05 needing 19, and says so.
    assert out["target_fpr"] == 0.05
    assert any("0.01 needs at least 99 calibration scores, this bank has 40" in m for m in said)
    for name in ("metrics.json", "scores.csv", "roc.png", "pr.png"):
        assert (tmp_path / "demo" / "evaluation" / name).is_file()
    assert out["n_references"] == 40
    assert out["auroc"] > 0.8     # the scenario's anomalies are visible ones; measured ~0.99 at full size
    assert (tmp_path / "demo" / MARKER).is_file()


def test_demo_refuses_a_folder_it_did_not_make(tmp_path):
    (tmp_path / "mine.txt").write_text("precious")
    result = CliRunner().invoke(main, ["demo", str(tmp_path), "-q"])
    assert result.exit_code == 2 and (tmp_path / "mine.txt").read_text() == "precious"


def test_demo_json_is_parseable(tmp_path, monkeypatch):
    import oddling.demo.run as demo

    monkeypatch.setattr(demo, "SceneCounts", lambda: SMALL)
    result = CliRunner().invoke(main, ["demo", str(tmp_path / "d"), "-q", "--json"])
    assert result.exit_code == 0, result.output
    assert 0.0 <= json.loads(result.stdout)["auroc"] <= 1.0
