"""evaluate end to end on scikit-learn's bundled digits; metrics checked against scikit-learn."""
import csv
import json

import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.metrics import average_precision_score, roc_auc_score

import oddling
from oddling.cli import main


@pytest.fixture(scope="module")
def evaluation(digits_folders, digits_bank):
    return oddling.evaluate(digits_folders["test"], digits_bank, options=oddling.RunOptions(progress=False))


def test_metrics_agree_with_scikit_learn_on_the_written_scores(evaluation, tmp_path):
    paths = evaluation.write(tmp_path / "eval")
    rows = [r for r in csv.DictReader(paths["scores"].open()) if r["score"]]
    labels = np.array([r["label"] == "anomalous" for r in rows], dtype=int)
    scores = np.array([float(r["score"]) for r in rows])
    metrics = json.loads(paths["metrics"].read_text())
    # scikit-learn is the reference; CSV scores are rounded to 6 decimals, hence the tolerance
    assert metrics["auroc"] == pytest.approx(roc_auc_score(labels, scores), abs=1e-4)
    assert metrics["average_precision"] == pytest.approx(average_precision_score(labels, scores), abs=1e-4)
    assert metrics["n_normal"] == 50 and metrics["n_anomalous"] == 72
    assert set(metrics["per_kind_auroc"]) == {f"digit{d}" for d in range(1, 10)}
    low, high = metrics["auroc_ci95"]
    assert low <= metrics["auroc"] <= high
    for name in ("roc.png", "pr.png"):
        assert (tmp_path / "eval" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_confusion_counts_add_up(evaluation):
    c = evaluation.metrics["at_cutoff"]
    assert c["tp"] + c["fn"] == 72 and c["fp"] + c["tn"] == 50


def test_labels_csv_gives_the_same_metrics(digits_folders, digits_bank, evaluation, tmp_path):
    table = tmp_path / "labels.csv"
    with table.open("w", newline="") as f:
        writer = csv.writer(f)
        writer.writerow(["path", "label"])
        for p in sorted(digits_folders["test"].rglob("*.png")):
            rel = p.relative_to(digits_folders["test"]).as_posix()
            writer.writerow([rel, 0 if rel.startswith("normal/") else 1])
    by_csv = oddling.evaluate(digits_folders["test"], digits_bank, labels_csv=table,
                              options=oddling.RunOptions(progress=False))
    assert by_csv.metrics["auroc"] == evaluation.metrics["auroc"]


def test_unreadable_files_are_listed_not_counted(digits_folders, digits_bank, tmp_path):
    import shutil

    test = tmp_path / "test"
    shutil.copytree(digits_folders["test"], test)
    (test / "normal" / "broken.png").write_bytes(b"")
    result = CliRunner().invoke(main, ["evaluate", str(test), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "--json", "-q"])
    assert result.exit_code == 0, result.output
    metrics = json.loads(result.stdout)
    assert metrics["n_normal"] == 50
    assert metrics["unreadable"] == [{"path": "normal/broken.png", "status": "unreadable: empty file (0 bytes)"}]


def test_evaluate_refuses_to_overwrite_results(digits_folders, digits_bank, tmp_path):
    args = ["evaluate", str(digits_folders["test"]), "--bank", str(digits_bank.path),
            "--out-dir", str(tmp_path / "out"), "-q"]
    assert CliRunner().invoke(main, args).exit_code == 0
    again = CliRunner().invoke(main, args)
    assert again.exit_code == 2 and "--force" in again.stderr


def test_only_one_class_is_a_clear_error(digits_folders, digits_bank):
    with pytest.raises(oddling.OddlingError, match="both classes"):
        oddling.evaluate(digits_folders["test"], digits_bank, normal_labels=("normal", *[f"digit{d}" for d in range(10)]),
                         options=oddling.RunOptions(progress=False))
